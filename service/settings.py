"""Server settings: one pydantic-settings class, read from ``TOPOSCOUT_*`` environment variables.

Every field can be set as ``TOPOSCOUT_<FIELD>`` (upper case), e.g. ``TOPOSCOUT_DATABASE_URL``,
``TOPOSCOUT_TOKENS="alice:tok1,bob:tok2"``, ``TOPOSCOUT_TASK_TIME_LIMIT_SECONDS=120``. Tests build
a ``Settings(...)`` directly and hand it to :func:`toposcout.service.api.app.create_app`.

The default store is the SQLite file ``toposcout.db`` (WAL mode) in :attr:`Settings.data_dir`
(``$TOPOSCOUT_DATA_DIR``, else ``$XDG_DATA_HOME/toposcout``, else ``~/.local/share/toposcout``).
"""

from __future__ import annotations

import os
import re
from pathlib import Path
from typing import Iterable

from pydantic import Field, SecretStr
from pydantic_settings import BaseSettings, SettingsConfigDict

from toposcout.compiler.errors import ToposcoutError
from toposcout.compiler.model import Limits
from toposcout.compiler.options import LIMITS
from toposcout.service.execution.threads import default_workers

__all__ = ["Settings", "default_data_dir", "parse_tokens"]

_OWNER = re.compile(r"^[A-Za-z0-9_.@-]{1,64}$")
_LIMITS = Limits()  # the library's caps: a server may lower them, not raise them
#: the defaults of max_json_containers and max_study_model_bytes (the API reads the settings)
MAX_JSON_CONTAINERS = 100_000
MAX_STUDY_MODEL_BYTES = 8 * 2**20


def default_data_dir() -> Path:
    """``$XDG_DATA_HOME/toposcout`` or ``~/.local/share/toposcout``."""
    base = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return Path(base) / "toposcout"


class Settings(BaseSettings):
    """What a toposcout server is allowed to do and where it keeps its data."""

    model_config = SettingsConfigDict(env_prefix="TOPOSCOUT_", extra="ignore")

    # --- where things live
    data_dir: Path = Field(default_factory=default_data_dir, description="folder of the default SQLite store")
    database_url: str | None = Field(
        default=None, description="SQLAlchemy URL; default sqlite:///<data_dir>/toposcout.db; "
        "PostgreSQL: postgresql+psycopg://user:pw@host:5432/db")

    # --- network and access
    host: str = "127.0.0.1"
    port: int = 8000
    allow_remote: bool = Field(default=False, description="serve non-loopback clients without tokens")
    tokens: SecretStr | None = Field(default=None, description='"owner:token,owner2:token2"')
    tokens_file: Path | None = Field(default=None, description="a file with one owner:token per line")

    # --- execution
    workers: int = Field(default_factory=default_workers, ge=1, le=64,
                         description="local worker processes (default: cores, at most 2)")
    task_time_limit_seconds: float = Field(default=900.0, gt=0, description="wall time one task may take")
    compile_time_limit_seconds: float = Field(default=60.0, gt=0,
                                              description="wall time of one POST /v1/compile request")
    dask_address: str | None = Field(default=None, description="tcp://host:8786 of a Dask scheduler")
    run_workers: bool = Field(default=True, description="the server starts a queue worker process of its own "
                              "(off: only separate `toposcout worker DATABASE_URL` processes do the work)")
    lease_seconds: float = Field(default=15.0, ge=1, le=3600,
                                 description="how long a queue worker's claim on a task holds without renewal; "
                                 "a killed worker's task is taken again after it")
    max_task_attempts: int = Field(default=4, ge=1, le=100,
                                   description="claims of one task (workers dying) before its row fails")

    # --- guards
    max_body_bytes: int = Field(default=4 * 2**20, ge=1024, description="largest request body (413 above)")
    max_variables: int = Field(default=64, ge=1, le=128, description="largest model (variables)")
    max_order: int = Field(default=12, ge=1, le=16,
                           description="largest term order (clique size after max_order)")
    max_active_qubits: int = Field(default=12, ge=1, le=20,
                                   description="largest density-matrix simulation (active qubits)")
    max_physical_qubits: int = Field(default=400, ge=2, description="largest connectivity instance")
    max_connectivities: int = Field(default=12, ge=1, description="targets per study")
    max_noise_scales: int = Field(default=16, ge=1, description="noise scales per study")
    max_compile_targets: int = Field(default=6, ge=1, description="targets per POST /v1/compile")
    max_fit_variables: int = Field(default=16, ge=1, le=20,
                                   description="largest model a study's fit block may fit (exact, 2**n amplitudes)")
    max_active_studies_per_owner: int = Field(default=8, ge=1,
                                              description="queued+running studies per token (429 above)")
    max_queued_tasks: int = Field(default=2000, ge=1,
                                  description="pending tasks of all studies together (429 with Retry-After above)")
    memory_budget_bytes: int | None = Field(default=None, ge=1,
                                            description="bytes one simulation may use (default: half the RAM)")

    # --- reading a request (each cap is checked as the request is read, before anything of its size exists)
    prepare_seconds: float = Field(default=5.0, gt=0, le=600,
                                   description="wall time reading a request's model and building its tasks may "
                                   "take (in a preparation process, stopped past it: 422)")
    prepare_memory_bytes: int = Field(default=512 * 2**20, ge=16 * 2**20,
                                      description="memory one preparation may allocate beyond its process's "
                                      "start-up (RLIMIT_DATA; 422 above)")
    prepare_processes: int = Field(default=2, ge=1, le=16,
                                   description="preparation processes: requests prepared at once (429 when all "
                                   "stay busy for prepare_seconds)")
    max_json_containers: int = Field(default=MAX_JSON_CONTAINERS, ge=100,
                                     description="objects and arrays in one JSON body, counted before decoding")
    max_study_model_bytes: int = Field(default=MAX_STUDY_MODEL_BYTES, ge=2**16,
                                       description="bytes of model JSON all tasks of one study carry together "
                                       "(tasks x model size)")
    max_cliques: int = Field(default=_LIMITS.max_cliques, ge=1, le=_LIMITS.max_cliques,
                             description="cliques of a JSON model, maximal cliques of a node-link graph")
    max_factors: int = Field(default=_LIMITS.max_factors, ge=1, le=_LIMITS.max_factors,
                             description="factors of a JSON model, functions of a UAI file")
    max_links: int = Field(default=_LIMITS.max_links, ge=1, le=_LIMITS.max_links,
                           description="links of a node-link graph")
    max_terms: int = Field(default=_LIMITS.max_terms, ge=1, le=_LIMITS.max_terms,
                           description="terms of a model after max_order (before de-duplication)")
    max_clique_steps: int = Field(default=_LIMITS.max_clique_steps, ge=100, le=_LIMITS.max_clique_steps,
                                  description="work budget of the maximal-clique enumeration of a node-link graph")
    max_seeds: int = Field(default=int(LIMITS["seeds"].high), ge=1, le=int(LIMITS["seeds"].high),
                           description="transpiler seeds per row")
    max_trajectories: int = Field(default=int(LIMITS["trajectories"].high), ge=1,
                                  le=int(LIMITS["trajectories"].high), description="trajectories per row")

    def resolved_database_url(self) -> str:
        """The database URL, creating the data folder for the default SQLite file."""
        if self.database_url:
            return self.database_url
        self.data_dir.mkdir(parents=True, exist_ok=True)
        return f"sqlite:///{self.data_dir / 'toposcout.db'}"

    def token_table(self) -> dict[str, str]:
        """token -> owner from ``tokens`` and ``tokens_file`` (empty: no authentication)."""
        lines: list[str] = []
        if self.tokens is not None:
            lines += self.tokens.get_secret_value().split(",")
        if self.tokens_file is not None:
            lines += self.tokens_file.read_text(encoding="utf-8").splitlines()
        return parse_tokens(lines)


def parse_tokens(lines: Iterable[str]) -> dict[str, str]:
    """token -> owner from ``owner:token`` entries; blank entries and ``#`` comments skipped.

    >>> parse_tokens(["alice:alice-tok-1", " # comment", "", "bob:bob-tok-22"])
    {'alice-tok-1': 'alice', 'bob-tok-22': 'bob'}
    """
    table: dict[str, str] = {}
    for n, raw in enumerate(lines, 1):
        line = raw.split("#", 1)[0].strip()
        if not line:
            continue
        owner, sep, token = line.partition(":")
        owner, token = owner.strip(), token.strip()
        if not sep or not token or not _OWNER.match(owner):
            raise ToposcoutError(f"token entry {n}: expected owner:token with an owner of letters, digits "
                                 "and _.@- (the token itself is not shown)", field="tokens")
        if len(token) < 8:
            raise ToposcoutError(f"token entry {n} (owner {owner}): a token needs at least 8 characters",
                                 field="tokens")
        if token in table:
            raise ToposcoutError(f"token entry {n} (owner {owner}): the same token is given twice", field="tokens")
        table[token] = owner
    return table
