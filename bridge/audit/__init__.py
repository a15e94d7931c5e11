"""The migration audit: the one pipeline over a whole archive, then checks across its records.

``rows`` (each outcome as a small row), ``reduce`` (the keyed streaming reduce and the
cross-archive checks) and ``stats`` (arrays for the plots) are pure; ``run`` (walking,
worker processes) and ``report`` (the files written) are the shell.
"""
