"""Checks on the files a command will write, made before anything is read.

``check_outputs(args)`` refuses (a ``UsageError``, exit status 2):

- an output that is one of the inputs: the same path, or the same file through a symbolic or hard
  link (compared by ``st_dev``/``st_ino``; for an output that does not exist yet, by resolved
  path), since writing it would destroy the data it is computed from;
- two outputs naming the same file (``--json X --svg X``), since one would silently replace the
  other;
- an output whose folder does not exist: tracechain never creates folders;
- an empty file name (``--json ''``, often an unset shell variable), which would otherwise write nothing.

``-`` (standard output) is never compared. Devices, FIFOs and sockets given as outputs
(``/dev/null``) are written in place and are only compared with the inputs.
"""

from __future__ import annotations

import argparse
import os
import stat

from .errors import UsageError

__all__ = ["OUTPUT_OPTIONS", "INPUT_OPTIONS", "check_outputs"]

# argparse destination -> the option as the user spells it, for the messages.
OUTPUT_OPTIONS = {
    "json": "--json", "dot": "--dot", "svg": "--svg", "png": "--png", "pdf": "--pdf",
    "html": "--html", "markdown": "--markdown", "csv": "--csv", "output": "--output",
}
# Destinations holding input paths (a string or a list of strings).
INPUT_OPTIONS = ("paths", "from_paths", "mapping", "rules", "baseline")


def _identity(path: str) -> tuple:
    """What names a file: (device, inode) when it exists, else its resolved path."""
    try:
        st = os.stat(path)
    except OSError:
        return ("path", os.path.realpath(path))
    return ("inode", st.st_dev, st.st_ino)


def _inputs(args: argparse.Namespace) -> list[str]:
    found: list[str] = []
    for dest in INPUT_OPTIONS:
        value = getattr(args, dest, None)
        if isinstance(value, str):
            found.append(value)
        elif isinstance(value, (list, tuple)):
            found.extend(v for v in value if isinstance(v, str))
    return [p for p in found if p and p != "-"]


def check_outputs(args: argparse.Namespace) -> None:
    """Raise ``UsageError`` if an output would overwrite an input or another output, or has no folder."""
    outputs = []
    for dest, option in OUTPUT_OPTIONS.items():
        value = getattr(args, dest, None)
        if value == "":  # `--json ''` (an unset shell variable): refused rather than silently not written
            raise UsageError(f"{option}: the file name is empty (name a file, or '-' for standard output)")
        if isinstance(value, str) and value and value != "-":
            outputs.append((option, value))
    if not outputs:
        return
    inputs = {}
    for path in _inputs(args):
        inputs.setdefault(_identity(path), path)
        # an input folder: every file it holds is an input too (one level is enough to catch
        # `analyze logs/ --json logs/a.jsonl`; deeper files are compared by resolved prefix)
    input_dirs = [os.path.realpath(p) for p in _inputs(args) if os.path.isdir(p)]
    seen: dict[tuple, tuple[str, str]] = {}
    for option, path in outputs:
        ident = _identity(path)
        if ident in inputs:
            raise UsageError(f"{option} {path}: that is the input {inputs[ident]}; "
                             "writing it would destroy the data (name another file)")
        real = os.path.realpath(path)
        for folder in input_dirs:
            if real.startswith(folder.rstrip(os.sep) + os.sep) and os.path.isfile(real):
                raise UsageError(f"{option} {path}: that file is inside the input folder {folder}; "
                                 "writing it would change the data read (name a file elsewhere)")
        if ident in seen:
            other_option, other_path = seen[ident]
            raise UsageError(f"{option} {path} and {other_option} {other_path} name the same file; "
                             "one would replace the other (name two files)")
        seen[ident] = (option, path)
        try:
            mode = os.stat(path).st_mode
        except OSError:
            mode = None
        if mode is not None and not stat.S_ISREG(mode) and not stat.S_ISDIR(mode):
            continue  # a device or FIFO: written in place
        folder = os.path.dirname(real) or "."
        if not os.path.isdir(folder):
            raise UsageError(f"{option} {path}: the folder {os.path.dirname(path) or folder} does not exist "
                             "(tracechain does not create folders; make it first)")
