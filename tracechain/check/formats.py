"""The report formats of the check gate, one registry for ``tracechain check`` and the pytest plugin.

``text`` (the terminal summary, chosen by no suffix), ``json`` (the check document, ``.json``),
``sarif`` (SARIF 2.1.0, ``.sarif`` or ``.sarif.json``) and ``junit`` (JUnit XML, ``.xml``).
"""

from __future__ import annotations

from ..renderers import Registry, Renderer

__all__ = ["CHECK_FORMATS"]


# each renderer imports its module on first use: the option parser needs the names only
def _text(result) -> str:
    from .report import render_check_text

    return render_check_text(result)


def _json(result) -> str:
    from .report import check_document, dumps_json

    return dumps_json(check_document(result))


def _sarif(result) -> str:
    from .report import dumps_json
    from .sarif import sarif_document

    return dumps_json(sarif_document(result))


def _junit(result) -> str:
    from .junit import junit_xml

    return junit_xml(result)


CHECK_FORMATS = Registry("report")
CHECK_FORMATS.register(Renderer("text", (), _text, "the summary as text"))
CHECK_FORMATS.register(Renderer("json", (".json",), _json, "the check document"))
CHECK_FORMATS.register(Renderer("sarif", (".sarif", ".sarif.json"), _sarif, "SARIF 2.1.0, for code-scanning views"))
CHECK_FORMATS.register(Renderer("junit", (".xml",), _junit, "JUnit XML, for CI test views"))
