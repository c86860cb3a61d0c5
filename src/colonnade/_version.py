"""The package version, in one place that every layer may import."""

__version__ = "0.1.0"
