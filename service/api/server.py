"""``toposcout serve``: the app under uvicorn, with tokens redacted from every log line."""

from __future__ import annotations

import copy
import logging
import multiprocessing
import os
import signal
import socket
import sys
import time

import uvicorn
from uvicorn.config import LOGGING_CONFIG

from toposcout.service.api.app import SUPERVISOR_PID_VARIABLE, create_app
from toposcout.service.api.auth import is_loopback, redact
from toposcout.service.execution.queue import spawn_queue_worker, stop_process
from toposcout.service.settings import Settings
from toposcout.service.store import Store

__all__ = ["serve", "log_config"]


class _RedactTokens(logging.Filter):
    """Removes ``token=...`` query values from log records (uvicorn's access log)."""

    def filter(self, record: logging.LogRecord) -> bool:
        if isinstance(record.msg, str):
            record.msg = redact(record.msg)
        if isinstance(record.args, tuple):
            record.args = tuple(redact(a) if isinstance(a, str) else a for a in record.args)
        return True


def log_config() -> dict:
    """uvicorn's logging configuration with token redaction on every handler."""
    cfg = copy.deepcopy(LOGGING_CONFIG)
    cfg.setdefault("filters", {})["redact"] = {"()": _RedactTokens}
    for handler in cfg.get("handlers", {}).values():
        handler.setdefault("filters", []).append("redact")
    cfg.setdefault("loggers", {})["toposcout"] = {"handlers": ["default"], "level": "INFO", "propagate": False}
    return cfg


def serve(*, host: str | None = None, port: int | None = None, allow_remote: bool | None = None,
          api_workers: int = 1, err=None) -> int:
    """Run the server under uvicorn (``toposcout serve``); returns the exit code.

    Without tokens the server refuses a non-loopback address unless ``allow_remote``.
    The store is migrated once here; then one queue worker process is started (unless
    ``run_workers`` is off), and ``api_workers`` uvicorn API processes share the store (one: in
    this process). Every child dies with this process (:mod:`toposcout.service.execution.lifeline`).
    """
    err = err or sys.stderr
    overrides = {k: v for k, v in {"host": host, "port": port, "allow_remote": allow_remote}.items() if v is not None}
    settings = Settings(**overrides)
    if not settings.token_table() and not settings.allow_remote and not is_loopback(settings.host):
        err.write(f"toposcout: error [host]: no tokens are configured, so the server listens on loopback only, not "
                  f"{settings.host}; set TOPOSCOUT_TOKENS / TOPOSCOUT_TOKENS_FILE, or pass --allow-remote\n")
        return 2
    if not 1 <= api_workers <= 64:
        err.write("toposcout: error [--workers]: --workers (API processes) must be 1..64\n")
        return 2
    url = settings.resolved_database_url()
    Store(url).close()  # migrate once, before any other process opens the store
    worker = spawn_queue_worker(url, slots=settings.workers) if settings.run_workers else None
    api_settings = settings.model_copy(update={"run_workers": False, "database_url": url})
    try:
        if api_workers == 1:
            config = uvicorn.Config(create_app(api_settings), host=settings.host, port=settings.port,
                                    log_config=log_config(), proxy_headers=False, timeout_keep_alive=30)
            uvicorn.Server(config).run()
        else:
            os.environ.update({"TOPOSCOUT_RUN_WORKERS": "0", "TOPOSCOUT_DATABASE_URL": url,
                               "TOPOSCOUT_HOST": settings.host, "TOPOSCOUT_PORT": str(settings.port),
                               SUPERVISOR_PID_VARIABLE: str(os.getpid())})
            problem = _port_problem(settings.host, settings.port)
            if problem:
                err.write(f"toposcout: error [port]: cannot listen on {settings.host}:{settings.port}: {problem}; "
                          "choose another --port or stop what holds it\n")
                return 2
            _supervise(settings.host, settings.port, api_workers)
    finally:
        stop_process(worker)
    return 0


# --- several API processes, each with its own listening socket ----------------------------------
# uvicorn's own --workers shares one listening socket among its processes; the kernel then hands
# most connections to whichever process wakes first (measured under the load benchmark: 2885 against
# 613 requests, 15 against 5 connections), and the busier process sets the latency tail. With
# SO_REUSEPORT every API process listens on a socket of its own and the kernel spreads new
# connections evenly over them (socket(7), Linux 3.9+).

def _listening_socket(host: str, port: int, *, listen: bool = True) -> socket.socket:
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEPORT, 1)
    sock.bind((host, port))
    if listen:
        sock.listen(2048)
    return sock


def _port_problem(host: str, port: int) -> str | None:
    """Why the API processes could not listen on ``host:port`` (None: they can). The probe binds
    and closes without listening, so no connection is ever routed to it."""
    try:
        _listening_socket(host, port, listen=False).close()
    except OSError as exc:
        return exc.strerror or str(exc)
    return None


def _api_process(host: str, port: int) -> None:  # pragma: no cover - runs in the child process
    sock = _listening_socket(host, port)
    config = uvicorn.Config("toposcout.service.api.app:app_from_environment", factory=True, host=host, port=port,
                            log_config=log_config(), proxy_headers=False, timeout_keep_alive=30)
    uvicorn.Server(config).run(sockets=[sock])


def _supervise(host: str, port: int, n: int) -> None:
    """Run ``n`` API processes until SIGINT/SIGTERM, starting a new one in place of one that dies
    (at most one restart a second). Each dies with this process (``app_from_environment``)."""
    ctx = multiprocessing.get_context("spawn")
    stopping = False

    def stop(_signum, _frame):
        nonlocal stopping
        stopping = True

    old = {sig: signal.signal(sig, stop) for sig in (signal.SIGINT, signal.SIGTERM)}

    def start() -> multiprocessing.Process:
        proc = ctx.Process(target=_api_process, args=(host, port), name="toposcout-api", daemon=False)
        proc.start()
        return proc

    procs = [start() for _ in range(n)]
    last_restart = 0.0
    try:
        while not stopping:
            time.sleep(0.2)
            for i, proc in enumerate(procs):
                if not proc.is_alive() and not stopping and time.monotonic() - last_restart >= 1.0:
                    logging.getLogger("toposcout").warning("API process %s exited (code %s); starting another",
                                                           proc.pid, proc.exitcode)
                    procs[i] = start()
                    last_restart = time.monotonic()
    finally:
        for proc in procs:
            if proc.is_alive():
                proc.terminate()  # uvicorn finishes its open requests on SIGTERM
        deadline = time.monotonic() + 10
        for proc in procs:
            proc.join(max(0.1, deadline - time.monotonic()))
            if proc.is_alive():
                proc.kill()
        for sig, handler in old.items():
            signal.signal(sig, handler)
