"""Severities of findings and the values of ``--fail-on``.

Apart from :mod:`tracechain.check.findings` (which needs the counts and their numeric stack), so
that the option parser offers the choices without loading it.
"""

from __future__ import annotations

__all__ = ["SEVERITIES", "FAIL_ON"]

#: Severities, weakest first (the SARIF 2.1.0 result levels without "none").
SEVERITIES = ("note", "warning", "error")
#: Values of ``--fail-on``: a severity, or ``never`` (report only).
FAIL_ON = ("error", "warning", "note", "never")
