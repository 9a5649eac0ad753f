"""The rankfold version (one place; the client re-exports it)."""

__version__ = "0.1.0"
