"""Text for people, pure: the ``check`` report, an HL7 v2 message with field names, a Bundle summarised."""
