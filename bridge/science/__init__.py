"""The science of the single-breath test, pure: units, normalisation, equations, quality, derivation, checks.

Nothing here reads files, the clock or the environment; values in, values out.
"""
