"""Limits shared by the YAML configuration loaders (the mapping file and the rules file).

PyYAML builds nested collections by recursion, so a file nested a few thousand levels
deep ends in a ``RecursionError`` (how deep depends on the interpreter's stack in use);
the event parser underneath is not recursive. :func:`check_depth` walks the events
first and refuses a file nested deeper than :data:`MAX_DEPTH`, with its line, before a
collection is built. No configuration file of tracechain needs more than a handful of
levels.
"""

from __future__ import annotations

import yaml

from .errors import ConfigError

__all__ = ["MAX_DEPTH", "check_depth", "decode_config"]

#: Deepest nesting of collections (mappings and lists) a configuration file may have.
MAX_DEPTH = 64


def decode_config(data: bytes, source: str, what: str) -> str:
    """A configuration file's bytes as text: UTF-8 (a byte order mark is dropped; YAML 1.2,
    section 5.2, allows one); anything else is a ConfigError naming the line."""
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        line = data.count(b"\n", 0, err.start) + 1
        raise ConfigError(f"the {what} is not UTF-8 text ({err.reason} at byte {err.start})", source,
                          line) from None


def check_depth(text: str, source: str | None, limit: int = MAX_DEPTH) -> None:
    """Raise ConfigError when collections in ``text`` nest deeper than ``limit``.

    Syntax errors are left to the loader that follows (which names them the same way).
    """
    depth = 0
    try:
        for event in yaml.parse(text, Loader=yaml.SafeLoader):
            if isinstance(event, yaml.CollectionStartEvent):
                depth += 1
                if depth > limit:
                    mark = event.start_mark
                    raise ConfigError(f"collections nested more than {limit} levels deep", source,
                                      mark.line + 1 if mark is not None else None)
            elif isinstance(event, yaml.CollectionEndEvent):
                depth -= 1
    except yaml.YAMLError:
        return
