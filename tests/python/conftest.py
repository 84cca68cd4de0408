"""Fixtures: the real `holdout` daemon on a fresh database, driven from Python.

Like tests/common/mod.rs: `holdout init` writes the first (custodian + organizer) token, then
`holdout serve --listen 127.0.0.1:0` prints `listening on ADDR` as its first stdout line.
The binary is $HOLDOUT_BIN, else target/debug/holdout of this repository (built by .ci/run).
"""

import json
import os
import subprocess
import threading
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
BIN = Path(os.environ.get("HOLDOUT_BIN", REPO / "target" / "debug" / "holdout"))
START_TIMEOUT = 60.0


def pytest_report_header(config):
    """Names the outside libraries (and versions) the tests compare against."""
    from importlib.metadata import PackageNotFoundError, version

    names = ["grpcio", "protobuf", "numpy", "pandas", "scikit-learn", "scipy", "statsmodels"]
    found = []
    for n in names:
        try:
            found.append(f"{n} {version(n)}")
        except PackageNotFoundError:
            found.append(f"{n} (not installed)")
    return [f"holdout binary: {BIN}", "libraries: " + ", ".join(found)]


class Daemon:
    """A running daemon: `url`, `admin` token, `dir` (scratch), `cli(...)` to run the binary."""

    def __init__(self, tmp: Path):
        if not BIN.exists():
            pytest.fail(f"no holdout binary at {BIN}: run `cargo build` or set HOLDOUT_BIN")
        self.dir = tmp
        self.bin_dir = BIN.parent
        db = tmp / "holdout.db"
        token_file = tmp / "admin.token"
        subprocess.run([str(BIN), "init", "--db", str(db), "--token-out", str(token_file)],
                       check=True, capture_output=True, env=self._env())
        self.admin = token_file.read_text().strip()
        assert self.admin, "holdout init wrote an empty token"
        self._log = open(tmp / "daemon.log", "wb")
        self.proc = subprocess.Popen(
            [str(BIN), "serve", "--listen", "127.0.0.1:0", "--db", str(db)],
            stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=self._log, env=self._env(),
        )
        first = {}
        got_first = threading.Event()

        def read_first():
            first["line"] = self.proc.stdout.readline().decode()
            got_first.set()
            for _ in self.proc.stdout:  # keep draining so later lines never block the daemon
                pass

        threading.Thread(target=read_first, daemon=True).start()
        got_first.wait(START_TIMEOUT)
        line = first.get("line", "")
        if not line.startswith("listening on "):
            self.stop()
            pytest.fail(f"daemon did not start: first line {line!r}\n{self.log()}")
        self.addr = line.strip()[len("listening on "):]
        self.url = f"http://{self.addr}"

    @staticmethod
    def _env(extra=None):
        env = {"PATH": os.environ.get("PATH", "")}
        env.update(extra or {})
        return env

    def cli(self, token, *args, check=None):
        """Runs `holdout ARGS` against this daemon; returns CompletedProcess (text)."""
        r = subprocess.run([str(BIN), *args], capture_output=True, text=True, cwd=self.dir,
                           env=self._env({"HOLDOUT_SERVER": self.url, "HOLDOUT_TOKEN": token}))
        if check is not None:
            assert r.returncode == check, (
                f"holdout {args} exited {r.returncode} (wanted {check})\n{r.stdout}\n{r.stderr}")
        return r

    def add_user(self, name, *roles, team=None):
        args = ["user", "add", name, "--json"]
        for role in roles:
            args += ["--role", role]
        if team:
            args += ["--team", team]
        return json.loads(self.cli(self.admin, *args, check=0).stdout)["token"]

    def log(self):
        try:
            return (self.dir / "daemon.log").read_text()
        except OSError:
            return ""

    def stop(self):
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait()
        self._log.close()


@pytest.fixture
def daemon(tmp_path):
    d = Daemon(tmp_path)
    yield d
    d.stop()
