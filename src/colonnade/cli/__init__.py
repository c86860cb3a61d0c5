"""The command line: parsing and formatting only; every verb calls one app function."""

from .main import main

__all__ = ["main"]
