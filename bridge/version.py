"""The version of dlco-bridge, written once (read by the build, the CLI, the service and the audit)."""

__version__ = "0.1.0"
