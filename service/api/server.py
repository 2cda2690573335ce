"""``toposcout serve``: the app under uvicorn, with tokens redacted from every log line."""

from __future__ import annotations

import copy
import inspect
import logging
import os
import sys

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
            # an API process imports the simulator stack before it answers uvicorn's health check: on a
            # busy machine that takes longer than uvicorn's 5 s default, which then kills it in a loop
            slow_start = ({"timeout_worker_healthcheck": 120}
                          if "timeout_worker_healthcheck" in inspect.signature(uvicorn.run).parameters else {})
            uvicorn.run("toposcout.service.api.app:app_from_environment", factory=True, host=settings.host,
                        port=settings.port, workers=api_workers, log_config=log_config(), proxy_headers=False,
                        timeout_keep_alive=30, **slow_start)
    finally:
        stop_process(worker)
    return 0
