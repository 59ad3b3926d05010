"""A throwaway PostgreSQL server for the tests: the Debian package's own binaries (initdb, pg_ctl)
in a temporary directory, on a free loopback port, run as a non-root user, stopped afterwards.

Password authentication over TCP (scram-sha-256), so a wrong password can be tested; the
superuser's password is written to a file for initdb and given to clients in PGPASSWORD.
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
from dataclasses import dataclass

USER = "tc_admin"
PASSWORD = "throwaway-test-password"


def find_bin_dir() -> str | None:
    """The newest /usr/lib/postgresql/*/bin holding initdb and pg_ctl, else the PATH's."""
    cands = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"),
                   key=lambda p: [int(x) if x.isdigit() else 0 for x in p.split("/")[4].split(".")])
    for initdb in reversed(cands):
        d = os.path.dirname(initdb)
        if os.path.exists(os.path.join(d, "pg_ctl")):
            return d
    initdb = shutil.which("initdb")
    pg_ctl = shutil.which("pg_ctl")
    if initdb and pg_ctl:
        return os.path.dirname(os.path.realpath(pg_ctl))
    return None


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _run_as() -> str | None:
    """A non-root account to run the server as (the server refuses root)."""
    if os.geteuid() != 0:
        return None
    for name in ("postgres", "nobody"):
        try:
            pwd.getpwnam(name)
            return name
        except KeyError:
            continue
    raise RuntimeError("running as root and no 'postgres' or 'nobody' account to run PostgreSQL as")


@dataclass
class Server:
    host: str
    port: int
    user: str
    password: str
    root: str
    bin_dir: str
    run_as: str | None

    def url(self, db: str = "postgres", user: str | None = None) -> str:
        return f"postgresql://{user or self.user}@{self.host}:{self.port}/{db}"

    def _cmd(self, args: list[str]) -> list[str]:
        return (["runuser", "-u", self.run_as, "--"] + args) if self.run_as else args

    def stop(self) -> None:
        subprocess.run(self._cmd([os.path.join(self.bin_dir, "pg_ctl"), "-D", os.path.join(self.root, "data"),
                                  "-m", "immediate", "-w", "stop"]), capture_output=True, timeout=60)
        shutil.rmtree(self.root, ignore_errors=True)


def start(bin_dir: str) -> Server:
    run_as = _run_as()
    root = tempfile.mkdtemp(prefix="tracechain-pg-")
    os.chmod(root, 0o755)
    data = os.path.join(root, "data")
    pwfile = os.path.join(root, "pw")
    with open(pwfile, "w") as f:
        f.write(PASSWORD + "\n")
    if run_as:
        ent = pwd.getpwnam(run_as)
        os.chown(root, ent.pw_uid, ent.pw_gid)
        os.chown(pwfile, ent.pw_uid, ent.pw_gid)
    os.chmod(pwfile, 0o600)
    srv = Server("127.0.0.1", _free_port(), USER, PASSWORD, root, bin_dir, run_as)
    env = {**os.environ, "LC_ALL": "C", "LANG": "C"}
    try:
        subprocess.run(srv._cmd([os.path.join(bin_dir, "initdb"), "-D", data, "-U", USER, f"--pwfile={pwfile}",
                                 "--auth-local=trust", "--auth-host=scram-sha-256", "-E", "UTF8", "--no-sync"]),
                       check=True, capture_output=True, timeout=120, env=env)
        opts = f"-h 127.0.0.1 -p {srv.port} -k {root} -c fsync=off -c full_page_writes=off"
        subprocess.run(srv._cmd([os.path.join(bin_dir, "pg_ctl"), "-D", data, "-o", opts, "-l",
                                 os.path.join(root, "log"), "-w", "-t", "60", "start"]),
                       check=True, capture_output=True, timeout=90, env=env)
    except (subprocess.CalledProcessError, subprocess.TimeoutExpired) as err:
        log = ""
        try:
            with open(os.path.join(root, "log")) as f:
                log = f.read()[-2000:]
        except OSError:
            pass
        out = getattr(err, "stderr", b"") or b""
        shutil.rmtree(root, ignore_errors=True)
        raise RuntimeError(f"could not start PostgreSQL: {err}; {out.decode(errors='replace')[-1000:]} {log}") from err
    return srv
