"""The exception hierarchy of tracechain.

Every error a user can cause (a bad file, a bad option, a bad mapping file) is a
:class:`TracechainError`; the command line turns it into one message and an exit
status instead of a traceback. Anything else escaping is a bug.
"""

from __future__ import annotations

__all__ = [
    "TracechainError",
    "UsageError",
    "IngestError",
    "FieldError",
    "ConfigError",
    "EmptyInputError",
    "PluginError",
    "RenderError",
    "AnalysisError",
]


class TracechainError(Exception):
    """Base class of all errors caused by input, options or configuration."""

    exit_status = 2


class UsageError(TracechainError):
    """An option or argument that cannot be honoured."""


class IngestError(TracechainError):
    """A problem in an input file, located by file and line where known."""

    def __init__(self, message: str, source: str | None = None, line: int | None = None):
        self.source = source
        self.line = line
        where = ""
        if source is not None:
            where = f"{source}:{line}: " if line is not None else f"{source}: "
        super().__init__(where + message)


class FieldError(IngestError):
    """A field named in an option (or required) does not exist in the data."""


class ConfigError(TracechainError):
    """A mapping or rules file that is malformed, located by file and line where known."""

    def __init__(self, message: str, source: str | None = None, line: int | None = None):
        self.source = source
        self.line = line
        where = ""
        if source is not None:
            where = f"{source}:{line}: " if line is not None else f"{source}: "
        super().__init__(where + message)


class EmptyInputError(TracechainError):
    """The input held no usable events or transitions."""


class PluginError(TracechainError):
    """A parser or rule plugin that cannot be loaded or used."""


class RenderError(TracechainError):
    """An output that could not be written (for example Graphviz is missing)."""


class AnalysisError(TracechainError):
    """An analysis that cannot be carried out on the given chain."""
