"""``toposcout serve``: the app under uvicorn, with tokens redacted from every log line."""

from __future__ import annotations

import copy
import logging
import sys

import uvicorn
from uvicorn.config import LOGGING_CONFIG

from toposcout.service.api.app import create_app
from toposcout.service.api.auth import is_loopback, redact
from toposcout.service.settings import Settings

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


def serve(*, host: str | None = None, port: int | None = None, allow_remote: bool | None = None, err=None) -> int:
    """Run the server under uvicorn (``toposcout serve``); returns the exit code.

    Without tokens the server refuses a non-loopback address unless ``allow_remote``.
    """
    err = err or sys.stderr
    overrides = {k: v for k, v in {"host": host, "port": port, "allow_remote": allow_remote}.items() if v is not None}
    settings = Settings(**overrides)
    if not settings.token_table() and not settings.allow_remote and not is_loopback(settings.host):
        err.write(f"toposcout: error [host]: no tokens are configured, so the server listens on loopback only, not "
                  f"{settings.host}; set TOPOSCOUT_TOKENS / TOPOSCOUT_TOKENS_FILE, or pass --allow-remote\n")
        return 2
    app = create_app(settings)
    config = uvicorn.Config(app, host=settings.host, port=settings.port, log_config=log_config(),
                            proxy_headers=False, timeout_keep_alive=30)
    uvicorn.Server(config).run()
    return 0
