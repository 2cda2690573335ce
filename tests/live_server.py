"""A real toposcout server for tests: uvicorn in a child process on 127.0.0.1, SQLite in a temp folder."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import httpx

ROOT = Path(__file__).resolve().parent.parent


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@dataclass
class LiveServer:
    url: str
    database_url: str
    process: subprocess.Popen
    log: Path

    def stop(self) -> None:
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=20)
            except subprocess.TimeoutExpired:  # pragma: no cover - a stuck shutdown
                self.process.kill()
                self.process.wait(timeout=10)


def start_server(folder: Path, *, tokens: str | None = None, workers: int = 2, timeout: float = 90.0,
                 env: dict[str, str] | None = None) -> LiveServer:
    """Start ``uvicorn --factory service.api:create_app`` and wait until /healthz answers.

    env: more ``TOPOSCOUT_*`` settings (e.g. the Dask address). Each start logs to its own
    ``server-PORT.log``, so a restarted server on the same folder keeps the first log."""
    folder.mkdir(parents=True, exist_ok=True)
    port = free_port()
    db = f"sqlite:///{folder / 'toposcout.db'}"
    child_env = {k: v for k, v in os.environ.items() if not k.startswith("TOPOSCOUT_")}
    child_env.update(TOPOSCOUT_DATABASE_URL=db, TOPOSCOUT_DATA_DIR=str(folder), TOPOSCOUT_WORKERS=str(workers),
                     PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    if tokens:
        child_env["TOPOSCOUT_TOKENS"] = tokens
    child_env.update(env or {})
    log = folder / f"server-{port}.log"
    fh = open(log, "wb")
    proc = subprocess.Popen([sys.executable, "-m", "uvicorn", "--factory", "service.api:create_app",
                             "--host", "127.0.0.1", "--port", str(port), "--log-level", "warning"],
                            cwd=ROOT, env=child_env, stdout=fh, stderr=subprocess.STDOUT)
    fh.close()
    url = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise RuntimeError(f"the test server exited with {proc.returncode}:\n{log.read_text(errors='replace')}")
        try:
            if httpx.get(url + "/healthz", timeout=2).status_code == 200:
                return LiveServer(url, db, proc, log)
        except httpx.HTTPError:
            pass
        time.sleep(0.25)
    proc.kill()
    raise RuntimeError(f"the test server did not answer within {timeout} s:\n{log.read_text(errors='replace')}")
