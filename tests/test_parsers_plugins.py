"""Third-party parsers through the ``tracechain.parsers`` entry-point group.

tests/data/plugin_dist/ is a complete (tiny) setuptools distribution defining a parser
for an invented format, pipe-separated ``session|time|event`` lines. Installing it means
putting its module and a ``*.dist-info`` directory (METADATA and entry_points.txt, the
installed-distribution layout of the Python packaging specifications, from memory) on
sys.path; that is what pip produces, and it is how importlib.metadata finds
installed distributions. The test builds that layout in tmp_path from the
distribution's own pyproject.toml, so no network or build step is needed.
"""

from __future__ import annotations

import importlib
import re
import sys
import warnings
from pathlib import Path

import pytest

from tracechain.ingest.registry import ENTRY_POINT_GROUP, available_parsers, detect_parser, get_parser
from tracechain.ingest.sources import Source
from tracechain.pipeline import count_sources

DIST = Path(__file__).parent / "data" / "plugin_dist"

# invented: two visits to the made-up shop "Quillfern Outfitters"
PIPES = "v1|1710230400|home\nv2|1710230405|home\nv1|1710230410|buy\nv2||item\n"


def entry_points_of(pyproject: Path) -> dict[str, str]:
    """The [project.entry-points."tracechain.parsers"] table of a pyproject.toml."""
    try:
        import tomllib
    except ImportError:  # Python 3.10: read the one table by hand
        text = pyproject.read_text(encoding="utf-8")
        table = text.split(f'[project.entry-points."{ENTRY_POINT_GROUP}"]', 1)[1].split("\n[", 1)[0]
        return dict(re.findall(r'^(\S+)\s*=\s*"([^"]+)"', table, re.M))
    data = tomllib.loads(pyproject.read_text(encoding="utf-8"))
    return dict(data["project"]["entry-points"][ENTRY_POINT_GROUP])


def install(site: Path, name: str, version: str, entry_points: dict[str, str], modules: dict[str, str]) -> None:
    info = site / f"{name.replace('-', '_')}-{version}.dist-info"
    info.mkdir(parents=True)
    (info / "METADATA").write_text(f"Metadata-Version: 2.1\nName: {name}\nVersion: {version}\n", encoding="utf-8")
    lines = [f"[{ENTRY_POINT_GROUP}]"] + [f"{k} = {v}" for k, v in entry_points.items()]
    (info / "entry_points.txt").write_text("\n".join(lines) + "\n", encoding="utf-8")
    for module, text in modules.items():
        (site / f"{module}.py").write_text(text, encoding="utf-8")


@pytest.fixture
def site(tmp_path, monkeypatch):
    site = tmp_path / "site-packages"
    site.mkdir()
    eps = entry_points_of(DIST / "pyproject.toml")
    assert eps == {"pipes": "tracechain_pipelog:PipeLogParser"}
    install(site, "tracechain-pipelog", "0.1.0", eps,
            {"tracechain_pipelog": (DIST / "tracechain_pipelog.py").read_text(encoding="utf-8")})
    monkeypatch.syspath_prepend(str(site))  # also invalidates importlib's caches
    for mod in ("tracechain_pipelog", "tracechain_broken_plugin"):
        monkeypatch.delitem(sys.modules, mod, raising=False)
    yield site
    importlib.invalidate_caches()


def test_plugin_is_found_and_reads_its_format(site, tmp_path):
    parser = get_parser("pipes")
    assert parser.description.startswith("pipe-separated")
    path = tmp_path / "visits.txt"
    path.write_text(PIPES, encoding="utf-8")
    counts, report = count_sources([str(path)], format="pipes")
    # v1: home -> buy; v2: home -> item (v2's item has no time, which is allowed)
    assert counts.to_edges() == {("[start]", "home"): 2, ("home", "buy"): 1, ("home", "item"): 1,
                                 ("buy", "[end]"): 1, ("item", "[end]"): 1}
    assert report.events == 4


def test_plugin_format_is_detected_from_content(site, tmp_path):
    path = tmp_path / "visits.log"
    path.write_text(PIPES, encoding="utf-8")
    assert detect_parser(Source(str(path), str(path))).name == "pipes"
    counts, _ = count_sources([str(path)])
    assert counts.sessions == 2


def test_without_the_plugin_the_format_is_unknown(tmp_path):
    assert "pipes" not in available_parsers()


def test_a_broken_plugin_warns_and_does_not_stop_the_others(site, tmp_path):
    install(site, "tracechain-broken-plugin", "0.1.0", {"broken": "tracechain_broken_plugin:Parser"},
            {"tracechain_broken_plugin": "import a_module_that_does_not_exist_anywhere\n"})
    importlib.invalidate_caches()
    path = tmp_path / "visits.txt"
    path.write_text(PIPES, encoding="utf-8")
    with pytest.warns(UserWarning, match=r"parser plugin 'broken' .* could not be loaded"):
        counts, _ = count_sources([str(path)], format="pipes")
    assert counts.sessions == 2
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        names = set(available_parsers())
    assert "pipes" in names and "broken" not in names and "access" in names


def test_a_plugin_may_not_take_a_builtin_name(site):
    install(site, "tracechain-impostor", "0.1.0", {"xes": "tracechain_impostor:Parser"},
            {"tracechain_impostor": "class Parser:\n    name = 'xes'\n    kind = 'events'\n"
                                    "    def sniff(self, head, name):\n        return 1.0\n"
                                    "    def read(self, source, options, report):\n        return iter(())\n"})
    importlib.invalidate_caches()
    with pytest.warns(UserWarning, match="taken name 'xes'"):
        parser = get_parser("xes")
    assert type(parser).__module__ == "tracechain.ingest.xes"


def test_the_distribution_is_complete():
    # what pip needs to build it: a build system, a name, a version and the module
    text = (DIST / "pyproject.toml").read_text(encoding="utf-8")
    assert "build-backend" in text and 'name = "tracechain-pipelog"' in text
    assert (DIST / "tracechain_pipelog.py").is_file()
    # (pip install tests/data/plugin_dist works too; not run here: it needs a build step)
