"""A stdlib-only PEP 517 build backend for this example distribution.

A real plugin would use ``setuptools.build_meta`` (or any other backend). This one exists
so the test suite can ``pip install`` the distribution with no network and without
setuptools or wheel in the environment: it reads the ``[project]`` table of
``pyproject.toml`` and writes a pure-Python wheel (the binary distribution format of
the Python packaging specifications: ``*.dist-info`` with METADATA, WHEEL,
entry_points.txt and RECORD) and an sdist. Only what this distribution uses is handled.
"""

from __future__ import annotations

import base64
import hashlib
import io
import re
import tarfile
import zipfile
from pathlib import Path

try:
    import tomllib
except ImportError:  # Python 3.10
    import tomli as tomllib

HERE = Path(__file__).resolve().parent
_EPOCH = (1980, 1, 1, 0, 0, 0)  # the earliest time a zip entry can carry; keeps builds reproducible


def _pyproject() -> dict:
    return tomllib.loads((HERE / "pyproject.toml").read_text(encoding="utf-8"))


def _project() -> dict:
    return _pyproject()["project"]


def _modules() -> list[str]:
    return list(_pyproject()["tool"]["pipelog-backend"]["py-modules"])


def _dist_name(project: dict) -> str:
    # the escaped name used in file names: runs of -_. become _
    return re.sub(r"[-_.]+", "_", project["name"]).lower()


def _metadata(project: dict) -> str:
    lines = ["Metadata-Version: 2.1", f"Name: {project['name']}", f"Version: {project['version']}"]
    if "description" in project:
        lines.append(f"Summary: {project['description']}")
    if "requires-python" in project:
        lines.append(f"Requires-Python: {project['requires-python']}")
    lines += [f"Requires-Dist: {req}" for req in project.get("dependencies", [])]
    return "\n".join(lines) + "\n"


def _entry_points(project: dict) -> str:
    out = []
    for group, table in project.get("entry-points", {}).items():
        out.append(f"[{group}]")
        out += [f"{name} = {value}" for name, value in table.items()]
        out.append("")
    return "\n".join(out)


def _record_line(path: str, data: bytes) -> str:
    digest = base64.urlsafe_b64encode(hashlib.sha256(data).digest()).rstrip(b"=").decode("ascii")
    return f"{path},sha256={digest},{len(data)}"


def get_requires_for_build_wheel(config_settings=None):
    return []


def get_requires_for_build_sdist(config_settings=None):
    return []


def build_wheel(wheel_directory, config_settings=None, metadata_directory=None):
    project = _project()
    dist = _dist_name(project)
    info = f"{dist}-{project['version']}.dist-info"
    files = {f"{m}.py": (HERE / f"{m}.py").read_bytes() for m in _modules()}
    files[f"{info}/METADATA"] = _metadata(project).encode("utf-8")
    files[f"{info}/WHEEL"] = b"Wheel-Version: 1.0\nGenerator: pipelog_backend\nRoot-Is-Purelib: true\nTag: py3-none-any\n"
    files[f"{info}/entry_points.txt"] = _entry_points(project).encode("utf-8")
    record = [_record_line(path, data) for path, data in files.items()] + [f"{info}/RECORD,,"]
    files[f"{info}/RECORD"] = ("\n".join(record) + "\n").encode("utf-8")
    name = f"{dist}-{project['version']}-py3-none-any.whl"
    with zipfile.ZipFile(Path(wheel_directory) / name, "w", zipfile.ZIP_DEFLATED) as whl:
        for path, data in files.items():
            entry = zipfile.ZipInfo(path, _EPOCH)
            entry.external_attr = 0o644 << 16
            whl.writestr(entry, data, zipfile.ZIP_DEFLATED)
    return name


def build_sdist(sdist_directory, config_settings=None):
    project = _project()
    base = f"{_dist_name(project)}-{project['version']}"
    members = {name: (HERE / name).read_bytes()
               for name in ["pyproject.toml", Path(__file__).name] + [f"{m}.py" for m in _modules()]}
    members["PKG-INFO"] = _metadata(project).encode("utf-8")
    name = f"{base}.tar.gz"
    with tarfile.open(Path(sdist_directory) / name, "w:gz", format=tarfile.PAX_FORMAT) as tar:
        for member, data in members.items():
            entry = tarfile.TarInfo(f"{base}/{member}")
            entry.size, entry.mode = len(data), 0o644
            tar.addfile(entry, io.BytesIO(data))
    return name
