"""The application layer: every workspace verb as one transaction (open, act, commit once).

The CLI calls only these functions and formats their results; the Python API offers the
same calls (``colonnade.seal_workspace``, ...).
"""
