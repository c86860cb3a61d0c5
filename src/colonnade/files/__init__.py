"""The files layer: the workspace store (atomic commit, safe loading), export, and the
standalone loader of exported files.
"""
