"""The report formats of the check gate, one registry for ``tracechain check`` and the pytest plugin.

``text`` (the terminal summary, chosen by no suffix), ``json`` (the check document, ``.json``),
``sarif`` (SARIF 2.1.0, ``.sarif`` or ``.sarif.json``) and ``junit`` (JUnit XML, ``.xml``).
"""

from __future__ import annotations

from ..renderers import Registry, Renderer
from .junit import junit_xml
from .report import check_document, dumps_json, render_check_text
from .sarif import sarif_document

__all__ = ["CHECK_FORMATS"]

CHECK_FORMATS = Registry("report")
CHECK_FORMATS.register(Renderer("text", (), render_check_text, "the summary as text"))
CHECK_FORMATS.register(Renderer("json", (".json",), lambda r: dumps_json(check_document(r)), "the check document"))
CHECK_FORMATS.register(Renderer("sarif", (".sarif", ".sarif.json"), lambda r: dumps_json(sarif_document(r)),
                                "SARIF 2.1.0, for code-scanning views"))
CHECK_FORMATS.register(Renderer("junit", (".xml",), junit_xml, "JUnit XML, for CI test views"))
