"""The version of tracechain, in a module of its own so that any layer can name it without
importing the package root (which re-exports the public API of every layer)."""

__version__ = "0.1.0"
