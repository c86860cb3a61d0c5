"""The training layer: data reading, fitting, the frozen-activation cache, data-parallel
mechanics, and one growth step. Reads the model; knows nothing of files or evidence.
"""
