"""The command line: parses, calls the application and the library, prints.

The only layer that may import any other.
"""
from hybrid.cli.main import app, main

__all__ = ["app", "main"]
