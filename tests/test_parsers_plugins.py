"""Third-party parsers through the ``tracechain.parsers`` entry-point group.

tests/data/plugin_dist/ is a complete (tiny) distribution defining a parser for an
invented format, pipe-separated ``session|time|event`` lines. Installing it means
putting its module and a ``*.dist-info`` directory (METADATA and entry_points.txt, the
installed-distribution layout of the Python packaging specifications, from memory) on
sys.path; that is what pip produces, and it is how importlib.metadata finds
installed distributions. Most tests here build that layout in tmp_path from the
distribution's own pyproject.toml (fast, in-process); the ``pip install`` tests at the
end install it with pip for real, offline, and run the command line against it.
"""

from __future__ import annotations

import importlib
import importlib.util
import json
import os
import re
import shutil
import subprocess
import sys
import warnings
from pathlib import Path

import pytest

from tracechain.errors import PluginError
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


# -- installed with pip ------------------------------------------------------------------------
#
# pip builds the distribution through its own stdlib-only build backend (pipelog_backend.py,
# see the distribution's pyproject.toml), so nothing is downloaded: --no-index forbids it,
# --no-build-isolation lets the backend see this interpreter's packages (tomli on Python 3.10).
# The command line then runs in a child process whose PYTHONPATH holds the install target,
# which is where importlib.metadata finds the distribution and its entry point.

# invented: four visits to the made-up shop "Quillfern Outfitters", one garbled line (7)
VISITS = (
    "s1|1710230400|home\n"
    "s2|1710230401|home\n"
    "s3|1710230402|home\n"
    "s4|1710230403|home\n"
    "s1|1710230410|item\n"
    "s2|1710230411|item\n"
    "garbled line without separators\n"
    "s3|1710230412|buy\n"
    "s1|1710230420|buy\n"
)
TRACECHAIN_HOME = Path(importlib.util.find_spec("tracechain").origin).resolve().parent.parent


def pip_missing() -> str | None:
    if importlib.util.find_spec("pip") is None:
        return f"pip is not installed for {sys.executable}; cannot install tests/data/plugin_dist"
    if sys.version_info < (3, 11) and importlib.util.find_spec("tomli") is None:
        return "the example distribution's build backend needs tomli on Python 3.10, and it is not installed"
    return None


@pytest.fixture(scope="module")
def pip_site(tmp_path_factory) -> Path:
    reason = pip_missing()
    if reason:
        pytest.skip(reason)
    root = tmp_path_factory.mktemp("pip-install")
    source = root / "plugin_dist"  # a copy: building must not write into the repository
    shutil.copytree(DIST, source, ignore=shutil.ignore_patterns("__pycache__", "build", "*.egg-info"))
    target = root / "site-packages"
    env = dict(os.environ, PIP_CONFIG_FILE=os.devnull, PIP_DISABLE_PIP_VERSION_CHECK="1",
               PIP_NO_INPUT="1", PYTHONDONTWRITEBYTECODE="1")
    done = subprocess.run(
        [sys.executable, "-m", "pip", "install", "--no-deps", "--no-build-isolation", "--no-index",
         "--no-cache-dir", "--target", str(target), str(source)],
        capture_output=True, text=True, env=env, timeout=120,
    )
    assert done.returncode == 0, f"pip install failed:\n{done.stdout}\n{done.stderr}"
    return target


def run_tracechain(paths: list[Path], *argv, cwd: Path) -> subprocess.CompletedProcess:
    """``tracechain ARGV`` in a child process with ``paths`` (then tracechain itself) on PYTHONPATH."""
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([*map(str, paths), str(TRACECHAIN_HOME)]))
    env.pop("PYTHONWARNINGS", None)
    code = "import sys; from tracechain.cli import main; sys.exit(main(sys.argv[1:]))"
    return subprocess.run([sys.executable, "-c", code, *map(str, argv)], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=120)


def check_visits(analysis: dict) -> None:
    # by hand from VISITS: s1 home,item,buy; s2 home,item; s3 home,buy; s4 home.
    # Goal buy is reached by s1 and s3: 2 of 4 sessions. As a chain: P(home->item) = 2/4,
    # P(home->buy) = 1/4, P(item->buy) = 1/2, so P(reach buy) = 1/2 * 1/2 + 1/4 = 1/2.
    assert analysis["input"]["lines_read"] == 9 and analysis["input"]["lines_skipped"] == 1
    assert analysis["overview"]["sessions"] == 4 and analysis["overview"]["events"] == 8
    states = {s["state"]: (s["visits"], s["sessions_lost"]) for s in analysis["states"] if s["role"] != "start"
              and s["role"] != "end"}
    assert states == {"home": (4, 1), "item": (2, 1), "buy": (2, 0)}
    assert analysis["conversion"]["from_start"] == pytest.approx(0.5)


def test_pip_installs_the_plugin_and_the_command_line_reads_its_format(pip_site, tmp_path):
    (tmp_path / "visits.log").write_text(VISITS, encoding="utf-8")
    listed = run_tracechain([pip_site], "formats", cwd=tmp_path)
    assert listed.returncode == 0, listed.stderr
    assert re.search(r"^pipes\s+events\s+pipe-separated session\|time\|event lines", listed.stdout, re.M)
    for extra in ([], ["--format", "pipes"]):  # detected from the content, then named
        done = run_tracechain([pip_site], "analyze", "visits.log", "--goal", "buy", "--json", "out.json",
                              "--quiet", *extra, cwd=tmp_path)
        assert done.returncode == 0, done.stderr
        assert "Traceback" not in done.stderr
        check_visits(json.loads((tmp_path / "out.json").read_text(encoding="utf-8")))
    # the same command without the install target on the path: the format is unknown
    done = run_tracechain([], "analyze", "visits.log", "--format", "pipes", "--quiet", cwd=tmp_path)
    assert done.returncode == 2
    assert "unknown format 'pipes'" in done.stderr and "Traceback" not in done.stderr


def test_a_plugin_that_fails_to_import_is_named_in_a_warning_not_a_traceback(pip_site, tmp_path):
    broken = tmp_path / "broken-site"
    install(broken, "tracechain-broken-plugin", "0.1.0", {"broken": "tracechain_broken_plugin:Parser"},
            {"tracechain_broken_plugin": "import a_module_that_does_not_exist_anywhere\n"})
    (tmp_path / "visits.log").write_text(VISITS, encoding="utf-8")
    done = run_tracechain([pip_site, broken], "analyze", "visits.log", "--goal", "buy", "--json", "out.json",
                          "--quiet", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    assert re.search(r"parser plugin 'broken' \(tracechain_broken_plugin:Parser.*could not be loaded.*"
                     r"a_module_that_does_not_exist_anywhere", done.stderr)
    check_visits(json.loads((tmp_path / "out.json").read_text(encoding="utf-8")))
    # naming the broken format itself: an error on one line, exit status 2
    done = run_tracechain([pip_site, broken], "analyze", "visits.log", "--format", "broken", cwd=tmp_path)
    assert done.returncode == 2 and "Traceback" not in done.stderr
    assert "format 'broken' is unavailable: parser plugin 'broken'" in done.stderr
    assert done.stderr.splitlines()[-1].startswith("tracechain: error: ")


def test_a_plugin_that_exits_while_imported_is_skipped_with_its_name(site, tmp_path):
    # a module raising SystemExit on import (as some scripts do when a dependency is missing)
    install(site, "tracechain-exiting-plugin", "0.2.0", {"exiting": "tracechain_exiting_plugin:Parser"},
            {"tracechain_exiting_plugin": "raise SystemExit('needs a library that is not installed')\n"})
    importlib.invalidate_caches()
    with pytest.warns(UserWarning) as caught:
        names = set(available_parsers())
    assert "pipes" in names and "exiting" not in names
    (text,) = [str(w.message) for w in caught if "exiting" in str(w.message)]
    assert text == ("parser plugin 'exiting' (tracechain_exiting_plugin:Parser, from the distribution "
                    "tracechain-exiting-plugin 0.2.0) could not be loaded: "
                    "SystemExit: needs a library that is not installed")
    with pytest.warns(UserWarning), pytest.raises(PluginError, match=r"format 'exiting' is unavailable: "
                                                                      r"parser plugin 'exiting' \("):
        get_parser("exiting")
