"""Pseudonymised session keys for reports.

Session keys (visit ids, user ids, ticket numbers) are often personal data. Reports,
examples of sessions and findings show them through a :class:`Pseudonymizer`: a keyed
hash, HMAC-SHA256 (RFC 2104 with SHA-256) of the key under a salt, truncated to 16
hexadecimal digits (64 bits) and written ``k:…``. The same key and salt always give the
same pseudonym, so two reports made with one salt can be matched up; without the salt the
pseudonym does not lead back to the key. The salt is given by the user (``--salt``) or
drawn with :mod:`secrets` for each run, and the report states it, so that later runs can
reuse it. Anyone holding both the salt and a list of candidate keys can test which of them
occur, so a report that carries its salt must be kept as carefully as the keys themselves
(or the salt line removed before it is shared). With ``raw=True`` (``--raw-keys``) keys
are shown as they are, and the report says so.

The hash is pseudonymisation, not anonymisation: the rest of a report (times, paths, rare
states) can still single a person out. :data:`DATA_PROTECTION_CAUTION` is the short caution
every report carries; it defers to the user's own rules and to the law that applies to them.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from dataclasses import dataclass, field

__all__ = ["Pseudonymizer", "DATA_PROTECTION_CAUTION", "PSEUDONYM_DIGITS"]

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
    """

    salt: str | None = None
    raw: bool = False
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

    def statement(self) -> str:
        """One paragraph for a report: how keys are shown, with the salt when hashed."""
        if self.raw:
            return (
                "Session keys are shown as they appear in the logs (raw keys were asked for with --raw-keys). "
                "They may identify people: share this report only as your rules allow."
            )
        origin = ("generated for this run with Python's secrets module" if self.generated
                  else "given with --salt")
        return (
            f"Session keys are pseudonymised: each is shown as k: and the first {PSEUDONYM_DIGITS} hexadecimal "
            f"digits of HMAC-SHA256(salt, key). The salt was {origin}: {self.salt}. Run again with "
            "--salt and this value to get the same pseudonyms. Anyone holding the salt and a list of "
            "candidate keys can check which occur in the logs, so keep this report as confidential as the "
            "keys, or remove this salt before sharing it."
        )
