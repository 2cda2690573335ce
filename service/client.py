"""A small client of the toposcout REST API, for notebooks, scripts and ``compare --server``.

Two lines from a notebook::

    from toposcout.service.client import Client
    df = Client("http://127.0.0.1:8000").compare("examples/orchard-frost.json", ["line", "grid"])

Exceptions::

    toposcout.compiler.errors.ToposcoutError
     └── ToposcoutClientError     every failure of the client: an error answer of the server,
                                  a refused connection, a time-out, a model it cannot read

It carries the server's message (``.message``), the HTTP status (``.status``; None when no
answer came) and the JSON field the server named (``.field``).

The client takes an injected ``httpx.Client`` (``http=``), so tests can drive it against the
app in process (Starlette's TestClient is an httpx.Client) or against a real server.
"""

from __future__ import annotations

import io
import json
import time
from html import escape
from pathlib import Path
from typing import TYPE_CHECKING, Any, Mapping, Sequence

import httpx

from toposcout.compiler.errors import ToposcoutError

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd
    from matplotlib.figure import Figure
    from qiskit import QuantumCircuit

__all__ = ["Client", "StudyHandle", "ToposcoutClientError", "model_payload", "request_from_tasks", "API_ONLY_COLUMNS"]

#: columns the API adds to each ``run_task`` row.
API_ONLY_COLUMNS = ("task_index", "status", "cached")
_FINAL = ("done", "failed", "cancelled")


class ToposcoutClientError(ToposcoutError):
    """A request to the server failed; ``.message`` is the server's message (or why no answer came).

    A :class:`toposcout.compiler.errors.ToposcoutError`, so callers that handle toposcout's errors
    (the CLI does) handle this one too.
    """

    def __init__(self, message: str, *, status: int | None = None, field: str | None = None,
                 url: str | None = None):
        super().__init__(message, field=field)
        self._message = message
        self.status = status
        self.url = url

    @property
    def message(self) -> str:
        return self._message

    def __str__(self) -> str:
        return f"HTTP {self.status}: {self._message}" if self.status is not None else self._message


def model_payload(model: Any) -> tuple[Any, str | None]:
    """Turn a model into ``(payload, model_format)`` for the API.

    model: a path (str or Path) of a JSON, UAI or node-link file; a dict in our JSON model
        format or node-link form; a networkx graph (the cliques are its maximal cliques; sent
        as node-link JSON); a ``toposcout.compiler.model.Model``; or the text of a UAI or JSON model.
    """
    try:
        import networkx as nx  # networkx only for node-link graphs: a client that only talks to a server need not load it
    except ImportError:  # pragma: no cover - networkx is a dependency
        nx = None
    if nx is not None and isinstance(model, nx.Graph):
        if model.number_of_nodes() == 0:
            raise ToposcoutClientError("the graph has no nodes; a model needs at least one variable", field="model")
        data = nx.node_link_data(model, edges="links")
        return json.loads(json.dumps(data, default=str)), "nodelink"
    to_dict = getattr(model, "to_dict", None)
    if callable(to_dict) and hasattr(model, "variables") and hasattr(model, "cliques"):
        return to_dict(), "json"
    if isinstance(model, Mapping):
        return dict(model), ("nodelink" if "nodes" in model and ("links" in model or "edges" in model) else "json")
    if isinstance(model, Path) or (isinstance(model, str) and "\n" not in model and len(model) < 4096
                                   and not model.lstrip().startswith(("{", "MARKOV"))):
        p = Path(model)
        try:
            text = p.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise ToposcoutClientError(f"cannot read the model file {str(p)!r}: "
                                       f"{getattr(exc, 'strerror', None) or exc}", field="model") from None
        if p.suffix.lower() == ".uai":
            return text, "uai"
        return _text_payload(text)
    if isinstance(model, str):
        return _text_payload(model)
    raise ToposcoutClientError(
        f"cannot send a model of type {type(model).__name__}; give a file path, a dict, a networkx graph "
        f"or the text of a UAI or JSON model", field="model")


def _text_payload(text: str) -> tuple[Any, str | None]:
    s = text.lstrip()
    if s.startswith("MARKOV"):
        return text, "uai"
    try:
        obj = json.loads(text)
    except ValueError:
        return text, None  # let the server say what is wrong with it
    if isinstance(obj, Mapping):
        return model_payload(obj)
    return text, None


class Client:
    """A toposcout server at ``url``.

    token: default None: no Authorization header; else sent as a bearer token.
    http: default None: a new ``httpx.Client`` (closed by :meth:`close`); else this client
        is used as is (its base URL is ignored; paths are joined to ``url``).
    timeout: default 30 s: time-out of each request (not of a whole study).
    """

    def __init__(self, url: str, token: str | None = None, *, http: httpx.Client | None = None,
                 timeout: float = 30.0):
        self.url = url.rstrip("/")
        self.token = token
        self._own = http is None
        self._http = http if http is not None else httpx.Client(timeout=timeout)

    # --- plumbing -----------------------------------------------------------------------
    def close(self) -> None:
        if self._own:
            self._http.close()

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def _headers(self, extra: Mapping[str, str] | None = None) -> dict[str, str]:
        h = {"Accept": "application/json"}
        if self.token:
            h["Authorization"] = f"Bearer {self.token}"
        h.update(extra or {})
        return h

    def request(self, method: str, path: str, *, json_body: Any = None, headers: Mapping[str, str] | None = None,
                params: Mapping[str, Any] | None = None) -> httpx.Response:
        """Send one request; an answer of 400 or more raises :class:`ToposcoutClientError`."""
        url = self.url + path
        try:
            resp = self._http.request(method, url, json=json_body, headers=self._headers(headers), params=params)
        except httpx.TimeoutException:
            raise ToposcoutClientError(f"the server at {self.url} did not answer in time", url=url) from None
        except httpx.HTTPError as exc:
            raise ToposcoutClientError(f"cannot reach the server at {self.url}: {exc}", url=url) from None
        if resp.status_code >= 400:
            raise _error_from(resp, url)
        return resp

    def _json(self, method: str, path: str, **kw) -> Any:
        resp = self.request(method, path, **kw)
        try:
            return resp.json()
        except ValueError:
            raise ToposcoutClientError(f"the server at {self.url} answered {path} with something that is not JSON",
                                       status=resp.status_code, url=self.url + path) from None

    # --- the API ------------------------------------------------------------------------
    def health(self) -> dict:
        return self._json("GET", "/healthz")

    def connectivities(self) -> Any:
        return self._json("GET", "/v1/connectivities")

    def profiles(self) -> Any:
        return self._json("GET", "/v1/profiles")

    def studies(self, *, status: str | None = None, owner: str | None = None, limit: int = 20,
                offset: int = 0, model: str | None = None, label: str | None = None) -> dict:
        """One page of the study list: ``{"items", "total", "limit", "offset"}``, newest first;
        ``model`` and ``label`` filter by the model's name and the study's label."""
        params = {k: v for k, v in dict(status=status, owner=owner, limit=limit, offset=offset, model=model,
                                        label=label).items() if v is not None}
        return self._json("GET", "/v1/studies", params=params)

    def study(self, study_id: str) -> "StudyHandle":
        """A handle on an existing study."""
        return StudyHandle(self, study_id)

    def submit(self, model: Any, connectivities: Sequence[str | Mapping[str, Any]] | None = None, *,
               profile: str | None = None, idempotency_key: str | None = None, **options: Any) -> "StudyHandle":
        """Submit a study; returns at once with a :class:`StudyHandle`.

        connectivities: default None: every built-in family, sized to the model.
        profile: default None: the server's default profile.
        options: further request fields (``noise_scales``, ``compile_only``, ``gate_set``,
            ``strategy``, ``seeds``, ``family``, ``layers``, ``seed``, ``max_order``,
            ``fidelity_target``, ``method``, ``time_budget_seconds``, ``trajectories``,
            ``precision``); the server validates them and says what is wrong.
        """
        payload, fmt = model_payload(model)
        body: dict[str, Any] = {"model": payload, "model_format": options.pop("model_format", fmt)}
        if connectivities is not None:
            body["connectivities"] = [c if isinstance(c, str) else dict(c) for c in connectivities]
        if profile is not None:
            body["profile"] = profile
        body.update(options)
        headers = {"Idempotency-Key": idempotency_key} if idempotency_key else None
        data = self._json("POST", "/v1/studies", json_body=body, headers=headers)
        return StudyHandle(self, data["id"], data)

    def compare(self, model: Any, connectivities: Sequence[str | Mapping[str, Any]] | None = None, *,
                profile: str | None = None, progress: bool = True, timeout: float | None = None,
                **options: Any) -> "pd.DataFrame":
        """Submit, wait (with a progress bar unless ``progress=False``) and return the rows as a DataFrame.

        The study itself (:class:`StudyHandle`: a readable summary in a notebook, ``plot(kind)`` for
        the dashboard's charts) is ``df.attrs["study"]``; :meth:`run` returns it directly."""
        h = self.run(model, connectivities, profile=profile, progress=progress, timeout=timeout, **options)
        df = h.rows()
        df.attrs["study"] = h
        return df

    def run(self, model: Any, connectivities: Sequence[str | Mapping[str, Any]] | None = None, *,
            profile: str | None = None, progress: bool = True, timeout: float | None = None,
            **options: Any) -> "StudyHandle":
        """Submit and wait; returns the finished :class:`StudyHandle` (``.rows()``, ``.plot(kind)``)."""
        h = self.submit(model, connectivities, profile=profile, **options)
        return h.wait(progress=progress, timeout=timeout)

    def compile(self, model: Any, connectivities: Sequence[str | Mapping[str, Any]] | None = None,
                **options: Any) -> list[dict]:
        """Compile-only, synchronous (a few targets): the rows as dicts."""
        payload, fmt = model_payload(model)
        body: dict[str, Any] = {"model": payload, "model_format": fmt, **options}
        if connectivities is not None:
            body["connectivities"] = list(connectivities)
        return self._json("POST", "/v1/compile", json_body=body)["rows"]

    def fit(self, model: Any, *, family: str = "clique", layers: int = 1, seed: int = 0, loss: str = "kl",
            data: str | Path | None = None, restarts: int = 3, max_iter: int = 500, tol: float = 1e-10,
            optimizer: str = "lbfgs", kernel_bandwidths: Sequence[float] | None = None,
            timeout: float | None = None) -> dict:
        """Fit the model's angles on the server; returns ``{"model", "parameters", "loss", "loss_value",
        "restart_losses", "key"}`` (``model``: the JSON model with the fitted parameters written in).

        It runs as a compile-only study on the all-to-all connectivity with a ``fit`` block, so the
        fit happens in a worker process (and a cancelled study stops it).
        data: CSV text or a path of a CSV file (header = variable names, 0/1 rows) for ``loss="mmd"``.
        """
        block: dict[str, Any] = {"loss": loss, "restarts": restarts, "max_iter": max_iter, "tol": tol,
                                 "optimizer": optimizer}
        if kernel_bandwidths is not None:
            block["kernel_bandwidths"] = [float(b) for b in kernel_bandwidths]
        if data is not None:
            text = str(data)
            if isinstance(data, Path) or ("\n" not in text and Path(text).is_file()):
                text = Path(text).read_text(encoding="utf-8")
            block["data"] = text
        h = self.submit(model, ["all-to-all"], compile_only=True, seeds=1, strategy="generic", family=family,
                        layers=layers, seed=seed, fit=block)
        h.wait(progress=False, timeout=timeout)
        rows = h.row_dicts()
        if not rows or rows[0].get("error"):
            why = rows[0].get("error") if rows else f"the study ended {h.status}"
            raise ToposcoutClientError(f"the fit failed: {why}", field=rows[0].get("error_field") if rows else None)
        row = rows[0]
        study_model = dict((h.refresh().get("request") or {}).get("model") or {})
        fitted = {**study_model, "parameters": row["fit_parameters"]} if study_model else None
        return {"model": fitted, "parameters": row["fit_parameters"], "loss": row["fit_loss"],
                "loss_value": row["fit_loss_value"], "restart_losses": row.get("fit_restart_losses"),
                "key": row.get("fit_key")}

    def run_tasks(self, model: Any, tasks: Sequence[Mapping[str, Any]], *, progress: bool = False,
                  timeout: float | None = None, on_submit: Any = None, label: str | None = None) -> list[dict]:
        """Run the study that ``toposcout.compiler.study.make_tasks`` built as ``tasks`` on the server.

        This is what ``toposcout compare --server URL`` calls. The tasks are turned back into
        one request (their connectivities, noise scales and shared options); the rows come
        back in task order as plain dicts without the API-only columns. ``on_submit``, when given,
        is called with the :class:`StudyHandle` as soon as the server has accepted the study.
        """
        if not tasks:
            return []
        body = request_from_tasks(tasks)
        if label is not None:
            body["label"] = label
        h = self.submit(model, body.pop("connectivities"), **body)
        if on_submit is not None:
            on_submit(h)
        h.wait(progress=progress, timeout=timeout)
        rows = sorted(h.row_dicts(), key=lambda r: r.get("task_index", 0))
        return [{k: v for k, v in r.items() if k not in API_ONLY_COLUMNS} for r in rows]


def request_from_tasks(tasks: Sequence[Mapping[str, Any]]) -> dict:
    """The API request fields that make the same tasks as ``tasks`` (from ``make_tasks``)."""
    first = tasks[0]
    conns: list[Any] = []
    scales: list[float] = []
    for t in tasks:
        spec = dict(t["connectivity"])
        if spec.get("edges"):
            c: Any = {"family": spec["family"], "edges": spec["edges"]}
            for key in ("name", "positions"):
                if spec.get(key):
                    c[key] = spec[key]
        else:
            c = spec["family"] + (f":{spec['size']}" if spec.get("size") else "")
        if c not in conns:
            conns.append(c)
        s = float(t.get("noise_scale", 1.0))
        if s not in scales:
            scales.append(s)
    profiles: list[Any] = []  # names, or profiles read from local files: sent as their content
    for t in tasks:
        p = t.get("profile")
        p = dict(p) if isinstance(p, Mapping) else p
        if p not in profiles:
            profiles.append(p)
    profile = profiles[0] if len(profiles) == 1 else profiles
    body: dict[str, Any] = {"connectivities": conns, "noise_scales": scales}
    for key in ("gate_set", "strategy", "seeds", "family", "layers", "seed", "compile_only", "fidelity_target",
                "requirement_tolerance", "method", "time_budget_seconds", "trajectories", "precision"):
        if key in first:
            body[key] = first[key]
    if profile is not None:
        body["profile"] = profile
    families = list(dict.fromkeys(t.get("family", "clique") for t in tasks))
    if len(families) > 1:
        body["families"] = families
    if first.get("fit_request"):
        body["fit"] = fit_block(first["fit_request"], first["model"]["variables"])
    return body


def fit_block(fit_request: Mapping[str, Any], variables: Sequence[str]) -> dict:
    """A task's ``fit_request`` as the API's ``fit`` block (samples written back as CSV text)."""
    block: dict[str, Any] = {k: fit_request[k] for k in ("loss", "restarts", "max_iter", "tol", "optimizer")
                             if k in fit_request}
    if fit_request.get("bandwidths"):
        block["kernel_bandwidths"] = [float(b) for b in fit_request["bandwidths"]]
    samples = fit_request.get("samples")
    if samples is not None:
        n = len(variables)
        lines = [",".join(variables)] + [",".join(str((int(x) >> j) & 1) for j in range(n)) for x in samples]
        block["data"] = "\n".join(lines) + "\n"
    return block


def _error_from(resp: httpx.Response, url: str) -> ToposcoutClientError:
    field = None
    try:
        data = resp.json()
    except ValueError:
        data = None
    if isinstance(data, Mapping) and "detail" in data:
        detail = data["detail"]
        field = data.get("field")
        if isinstance(detail, list):  # a framework validation list: keep the first message and its place
            first = detail[0] if detail else {}
            loc = [str(x) for x in (first.get("loc") or []) if x not in ("body", "query", "path")]
            field = field or (".".join(loc) or None)
            msg = first.get("msg") or json.dumps(detail)
        else:
            msg = str(detail)
    else:
        text = resp.text.strip()
        msg = text[:500] if text else (resp.reason_phrase or "error")
    return ToposcoutClientError(msg, status=resp.status_code, field=field, url=url)


class StudyHandle:
    """A study on the server: poll it, wait for it, fetch its rows and circuits."""

    def __init__(self, client: Client, study_id: str, data: Mapping[str, Any] | None = None):
        self.client = client
        self.id = study_id
        self._data: dict[str, Any] = dict(data or {})

    def __repr__(self) -> str:
        return f"StudyHandle(id={self.id!r}, status={self._data.get('status')!r})"

    def __deepcopy__(self, memo) -> "StudyHandle":  # a handle names a study on the server: copies share it
        return self  # (pandas deep-copies DataFrame.attrs, where compare() keeps the handle)

    def __copy__(self) -> "StudyHandle":
        return self

    @property
    def dashboard_url(self) -> str:
        """The study's page on the server's dashboard."""
        return f"{self.client.url}/studies/{self.id}"

    def refresh(self) -> dict:
        """Fetch the study (summary, progress and rows) and return it."""
        self._data = self.client._json("GET", f"/v1/studies/{self.id}")
        return self._data

    @property
    def status(self) -> str | None:
        return self._data.get("status")

    @property
    def progress(self) -> tuple[int, int]:
        p = self._data.get("progress") or {}
        return int(p.get("done", 0)), int(p.get("total", 0))

    def wait(self, *, progress: bool = True, timeout: float | None = None, poll: float = 0.5) -> "StudyHandle":
        """Poll until the study is done, failed or cancelled; returns self.

        progress: default True: a tqdm progress bar (works in notebooks and terminals).
        timeout: default None: wait as long as it takes; else raise ToposcoutClientError
            after this many seconds (the study keeps running on the server).
        poll: default 0.5 s between polls.
        """
        bar = None
        if progress:
            from tqdm.auto import tqdm  # a progress bar only when one is asked for

            bar = tqdm(total=self.progress[1] or None, unit="row", desc=f"study {self.id[:8]}", leave=False)
        started = time.monotonic()
        try:
            while True:
                data = self.refresh()
                done, total = self.progress
                if bar is not None:
                    if total and bar.total != total:
                        bar.total = total
                        bar.refresh()
                    if done > bar.n:
                        bar.update(done - bar.n)
                if data.get("status") in _FINAL:
                    return self
                if timeout is not None and time.monotonic() - started > timeout:
                    raise ToposcoutClientError(
                        f"study {self.id} is still {data.get('status')} after {timeout:g} s "
                        f"({done}/{total} rows); wait again or look at it on the dashboard")
                time.sleep(poll)
        finally:
            if bar is not None:
                bar.close()

    def summary(self) -> dict:
        """What the study is, in a few fields: id, status, model, profile(s), noise scales,
        connectivities, progress and the dashboard page."""
        if not self._data.get("request"):
            self.refresh()
        req = self._data.get("request") or {}
        prof = req.get("profile")
        conns = [c if isinstance(c, str) else (c.get("name") or c.get("family", "?")) + (
            f":{c['size']}" if isinstance(c, Mapping) and c.get("size") else "") for c in req.get("connectivities") or []]
        done, total = self.progress
        return {"id": self.id, "status": self.status, "model": self._data.get("model_name"),
                "profile": prof.get("name") if isinstance(prof, Mapping) else (prof or "server default"),
                "noise_scales": req.get("noise_scales"), "connectivities": conns or "every built-in family",
                "compile_only": req.get("compile_only"), "rows": f"{done}/{total}",
                "best_connectivity": self._data.get("best_connectivity"), "dashboard": self.dashboard_url}

    def _repr_html_(self) -> str:
        """A notebook's view of the study: its summary as a small table."""

        cells = "".join(f"<tr><th style='text-align:left'>{escape(k.replace('_', ' '))}</th>"
                        f"<td style='text-align:left'>{escape(', '.join(map(str, v)) if isinstance(v, list) else str(v))}"
                        f"</td></tr>" for k, v in self.summary().items() if k != "dashboard")
        url = escape(self.dashboard_url)
        return (f"<table><caption style='text-align:left'>toposcout study</caption>{cells}"
                f"<tr><th style='text-align:left'>dashboard</th><td><a href='{url}'>{url}</a></td></tr></table>")

    def charts(self) -> list[str]:
        """The chart kinds this study's rows can fill (the dashboard's charts)."""
        from toposcout.service.web.charts import available_charts  # the charts load matplotlib: only when a chart is asked for

        return available_charts(self.row_dicts())

    def plot(self, kind: str = "gates") -> "Figure":
        """A dashboard chart as a matplotlib Figure (``gates``, ``fidelity``, ``budget``, ``sweep``):
        the same drawing as the dashboard's, so a notebook needs no plotting code of its own.
        Raises ToposcoutError (field ``chart``) when the rows cannot fill it."""
        from toposcout.service.web.charts import chart_figure  # the charts load matplotlib: only when a chart is asked for

        if self.status not in _FINAL:
            self.refresh()
        return chart_figure(kind, self.row_dicts())

    def row_dicts(self) -> list[dict]:
        """The rows as the API gives them (with ``task_index``, ``status``, ``cached``)."""
        if "rows" not in self._data:
            self.refresh()
        return [dict(r) for r in self._data.get("rows") or []]

    def rows(self) -> "pd.DataFrame":
        """The rows as a pandas DataFrame, one row per task, in task order."""
        import pandas as pd  # pandas only for a DataFrame

        if self.status not in _FINAL or "rows" not in self._data:
            self.refresh()
        rows = sorted(self.row_dicts(), key=lambda r: r.get("task_index", 0))
        return pd.DataFrame.from_records(rows)

    def cancel(self) -> dict:
        self._data = {**self._data, **self.client._json("DELETE", f"/v1/studies/{self.id}")}
        return self._data

    def qpy(self, task_index: int) -> bytes:
        """The compiled circuit of a row as QPY bytes."""
        return self.client.request("GET", f"/v1/studies/{self.id}/circuits/{int(task_index)}.qpy").content

    def qasm(self, task_index: int) -> str:
        """The compiled circuit of a row as OpenQASM 3 text."""
        return self.client.request("GET", f"/v1/studies/{self.id}/circuits/{int(task_index)}.qasm").text

    def circuit(self, task_index: int) -> "QuantumCircuit":
        """The compiled circuit of a row, loaded with qiskit."""

        from qiskit import qpy  # qiskit only when a circuit is loaded

        return qpy.load(io.BytesIO(self.qpy(task_index)))[0]

