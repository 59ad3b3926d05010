"""Untrusted names (states, session keys, file names) made visible as plain text, for every
renderer; each renderer escapes the result for its own format."""

from __future__ import annotations

import unicodedata
from typing import Any

__all__ = ["safe_name"]


def safe_name(text: Any, limit: int = 120) -> str:
    """Untrusted text made visible: control, format (bidi) and separator characters become
    ``\\xNN`` / ``\\uNNNN`` escapes, and text longer than ``limit`` is shortened with "…".
    The result is still plain text; each renderer escapes it for its format."""
    out = []
    for ch in str(text):
        cat = unicodedata.category(ch)
        if cat in ("Cc", "Cf", "Zl", "Zp", "Cs", "Co", "Cn") and ch != " ":
            code = ord(ch)
            out.append(f"\\x{code:02x}" if code <= 0xFF else f"\\u{code:04x}" if code <= 0xFFFF else f"\\U{code:08x}")
        else:
            out.append(ch)
    s = "".join(out)
    return s if len(s) <= limit else s[: limit - 1] + "…"
