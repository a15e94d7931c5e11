"""The migration audit: the one pipeline over a whole archive, then checks across its records.

``rows`` (each outcome as a small row), ``reduce`` (the keyed streaming reduce and the
cross-archive checks, the hand-over's verdicts) and ``stats`` (arrays for the plots) are pure;
``run`` (walking, worker processes), ``index`` (the scratch index), ``report`` (the files
written, the hand-over) and ``page`` (the report page) are the shell.
"""
