"""Pseudonymised session keys for reports.

Session keys (visit ids, user ids, ticket numbers) are often personal data. Reports,
examples of sessions and findings show them through a :class:`Pseudonymizer`: a keyed
hash, HMAC-SHA256 (RFC 2104 with SHA-256) of the key under a salt, truncated to 16
hexadecimal digits (64 bits) and written ``k:…``. The same key and salt always give the
same pseudonym, so two reports made with one salt can be matched up; without the salt the
pseudonym does not lead back to the key. The salt is given by the user (``--salt``), kept
in a local file (``--salt-file FILE``: read when it exists, otherwise created with a new
salt, readable by its owner only), or drawn with :mod:`secrets` for each run. Anyone holding
both the salt and a list of candidate keys can test which of them occur, so no shared
artefact (report, SARIF, JUnit, JSON) carries the salt: a drawn salt is printed to standard
error only (:func:`announce_salt`), and the outputs say where the salt is. With
``raw=True`` (``--raw-keys``) keys are shown as they are, and the outputs say so. Every
output of tracechain (reports, comparisons, the ``check`` gate, the pytest plugin) uses the
same default: pseudonymised unless raw keys are asked for.

The hash is pseudonymisation, not anonymisation: the rest of a report (times, paths, rare
states) can still single a person out. :data:`DATA_PROTECTION_CAUTION` is the short caution
every report carries; it defers to the user's own rules and to the law that applies to them.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from dataclasses import dataclass, field

__all__ = ["Pseudonymizer", "DATA_PROTECTION_CAUTION", "PSEUDONYM_DIGITS", "add_privacy_options",
           "pseudonymizer_from_args", "announce_salt", "read_or_create_salt"]

#: Hexadecimal digits kept from the HMAC (64 bits: two keys share a pseudonym with
#: probability about n² / 2⁶⁵ for n keys, under one in 30,000 for a million keys).
PSEUDONYM_DIGITS = 16

DATA_PROTECTION_CAUTION = (
    "Session keys, event names, times and file paths in logs can be personal data, and so can "
    "this report. Handle the logs and everything made from them under your organisation's own "
    "rules and the data-protection law that applies to you; ask your data-protection officer or "
    "counsel when in doubt. Pseudonymised keys are still personal data wherever the salt or the "
    "original logs are at hand."
)


@dataclass
class Pseudonymizer:
    """Turns session keys into stable pseudonyms (or passes them through with ``raw``).

    Parameters
    ----------
    salt : str, optional
        The HMAC key. Drawn with ``secrets.token_hex(16)`` when not given (``generated``
        is then True).
    raw : bool
        Show keys unchanged (the user asked for raw keys).
    salt_file : str, optional
        The local file the salt was read from or stored in (stated in the outputs instead of
        the salt).
    """

    salt: str | None = None
    raw: bool = False
    salt_file: str | None = None
    generated: bool = field(default=False, init=False)

    def __post_init__(self) -> None:
        if self.salt is None or self.salt == "":
            self.salt = secrets.token_hex(16)
            self.generated = True
        self._key = str(self.salt).encode("utf-8")
        self._cache: dict[str, str] = {}

    def __call__(self, key: object) -> str:
        """The pseudonym of one session key (``k:`` and 16 hex digits), or the key if raw."""
        text = str(key)
        if self.raw:
            return text
        got = self._cache.get(text)
        if got is None:
            digest = hmac.new(self._key, text.encode("utf-8", "surrogatepass"), hashlib.sha256).hexdigest()
            got = "k:" + digest[:PSEUDONYM_DIGITS]
            if len(self._cache) < 100_000:
                self._cache[text] = got
        return got

    @property
    def mode(self) -> str:
        return "raw" if self.raw else "pseudonymised"

    def salt_whereabouts(self) -> str:
        """Where the salt is (never the salt itself)."""
        if self.salt_file is not None:
            return f"it is kept in the local file {self.salt_file}"
        if self.generated:
            return ("it was drawn for this run with Python's secrets module and printed to standard error only "
                    "(keep it, or use --salt-file FILE, to get the same pseudonyms again)")
        return "it was given with --salt"

    def statement(self) -> str:
        """One paragraph for a report: how keys are shown, and where the salt is (it is not in the report)."""
        if self.raw:
            return (
                "Session keys are shown as they appear in the logs (raw keys were asked for with --raw-keys). "
                "They may identify people: share this report only as your rules allow."
            )
        return (
            f"Session keys are pseudonymised: each is shown as k: and the first {PSEUDONYM_DIGITS} hexadecimal "
            f"digits of HMAC-SHA256(salt, key). The salt is not in this report: {self.salt_whereabouts()}. "
            "Anyone holding the salt and a list of candidate keys can check which occur in the logs, so keep the "
            "salt as confidential as the keys."
        )


def read_or_create_salt(path: str) -> str:
    """The salt kept in ``path``; a new random one is stored there (mode 0600) when the file does not exist."""
    import os

    from .errors import UsageError

    try:
        with open(path, encoding="utf-8") as fh:
            salt = fh.read().strip()
    except FileNotFoundError:
        salt = secrets.token_hex(16)
        try:
            fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        except OSError as err:
            raise UsageError(f"--salt-file {path}: cannot create it ({err.strerror})") from None
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(salt + "\n")
        return salt
    except (OSError, UnicodeDecodeError) as err:
        raise UsageError(f"--salt-file {path}: cannot read it ({getattr(err, 'strerror', None) or err})") from None
    if not salt:
        raise UsageError(f"--salt-file {path}: the file is empty (delete it to have a new salt stored there)")
    return salt


def _salt_text(text: str) -> str:
    """``--salt TEXT``: an empty salt would silently fall back to a random one, so it is refused."""
    import argparse

    if not text:
        raise argparse.ArgumentTypeError("the salt must not be empty (leave --salt out for a random one)")
    return text


def add_privacy_options(p) -> None:
    """``--salt``, ``--salt-file`` and ``--raw-keys`` (one definition for every command that shows keys)."""
    g = p.add_argument_group("session keys (personal data)")
    k = g.add_mutually_exclusive_group()
    k.add_argument("--salt", metavar="TEXT", type=_salt_text,
                   help="salt of the keyed hash that pseudonymises session keys (default: a new random salt, "
                        "printed to standard error, never written into an output)")
    k.add_argument("--salt-file", metavar="FILE",
                   help="keep the salt in this local file: read it when the file exists, otherwise store a new "
                        "random salt there (readable by you only); the outputs name the file, not the salt")
    k.add_argument("--raw-keys", action="store_true",
                   help="show session keys as they are (default: pseudonymised in every output)")


def pseudonymizer_from_args(args) -> Pseudonymizer:
    """The :class:`Pseudonymizer` the privacy options ask for."""
    path = getattr(args, "salt_file", None)
    if path:
        return Pseudonymizer(salt=read_or_create_salt(path), salt_file=path)
    return Pseudonymizer(salt=getattr(args, "salt", None), raw=bool(getattr(args, "raw_keys", False)))


def announce_salt(pseudo: Pseudonymizer, stream=None) -> None:
    """Print a drawn salt to standard error (the only place it goes), or nothing."""
    import sys

    if pseudo.raw or not pseudo.generated:
        return
    print(f"tracechain: session keys are pseudonymised with the salt {pseudo.salt} (drawn for this run, not "
          "written to any output; --salt with this value gives the same pseudonyms again)",
          file=stream if stream is not None else sys.stderr)
