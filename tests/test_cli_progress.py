"""`toposcout compare` shows a progress bar on a terminal, and none with --json or when piped."""

from __future__ import annotations

import fcntl
import json
import re
import os
import pty
import select
import struct
import subprocess
import sys
import termios
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
CMD = [sys.executable, "-m", "toposcout.service.cli", "compare", str(ROOT / "examples" / "warehouse-doors.uai"),
       "-c", "line", "-c", "ring", "--compile-only", "--strategy", "generic", "--seeds", "1"]
BAR = re.compile(rb"toposcout:\s+\d+%\|.*\d+/2 \[")  # tqdm's bar: "toposcout:  0%|   | 0/2 ["


def _env() -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    env.pop("TQDM_DISABLE", None)
    return env


def _run_on_terminal(args: list[str]) -> tuple[int, bytes]:
    """Run ``args`` with stdin/stdout/stderr on a pseudo-terminal of 40 x 120 characters."""
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 40, 120, 0, 0))
    proc = subprocess.Popen(args, stdin=slave, stdout=slave, stderr=slave, close_fds=True, cwd=ROOT, env=_env())
    os.close(slave)
    out = b""
    try:
        while True:
            ready, _, _ = select.select([master], [], [], 120)
            if not ready:
                break
            try:
                chunk = os.read(master, 65536)
            except OSError:  # the child closed the terminal
                break
            if not chunk:
                break
            out += chunk
    finally:
        os.close(master)
        code = proc.wait(timeout=120)
    return code, out


@pytest.mark.skipif(sys.platform == "win32", reason="pseudo-terminals are POSIX")
def test_progress_bar_is_shown_on_a_terminal():
    code, out = _run_on_terminal(CMD)
    assert code == 0, out.decode(errors="replace")
    assert BAR.search(out)
    assert b"line-6" in out  # and the table still follows


@pytest.mark.skipif(sys.platform == "win32", reason="pseudo-terminals are POSIX")
def test_no_progress_bar_with_json_even_on_a_terminal():
    code, out = _run_on_terminal(CMD + ["--json"])
    assert code == 0
    assert not BAR.search(out) and b"%|" not in out
    text = out.decode().replace("\r\n", "\n")
    assert [r["connectivity"] for r in json.loads(text)["rows"]] == ["line-6", "ring-6"]


def test_no_progress_bar_when_not_a_terminal():
    proc = subprocess.run(CMD, capture_output=True, cwd=ROOT, env=_env(), timeout=120)
    assert proc.returncode == 0
    assert not BAR.search(proc.stderr) and b"%|" not in proc.stderr + proc.stdout
    assert b"line-6" in proc.stdout
