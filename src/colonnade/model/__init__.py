"""The model layer: spec, layers, adapters, the progressive network, closures and the seal guard.

Knows nothing of files, training or reports; everything above builds on it.
"""
