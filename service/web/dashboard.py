"""The dashboard: server-rendered HTML pages over the JSON API (an APIRouter mounted at ``/``).

Pages:

* ``/``                        the study list (newest first, paged; updates itself while studies run);
* ``/studies/{id}``            one study: its rows, all charts side by side, a drawing per
                               connectivity, downloads; progress updates without a reload;
* ``/submit``                  a form to submit a model file with targets and a profile;
* ``/signin``                  asks for a bearer token when the server has tokens.

Every page reads its data through the JSON API itself, in process (the request is replayed on
the app with the caller's address and token), so the pages show exactly what the API allows
and the form shows exactly the API's validation messages. The pages load nothing from other
hosts (a Content-Security-Policy header of ``'self'`` only enforces that); the one script,
``/static/dashboard.js``, polls the JSON API.

With tokens configured, ``?token=T`` on any page (or the sign-in form) stores the token in an
HTTP-only cookie that the API also accepts, and the token is removed from the address.
"""

from __future__ import annotations

import base64
import binascii
import datetime as dt
import io
import json
import math
from collections import OrderedDict
from pathlib import Path
from threading import Lock
from typing import Any, Mapping
from urllib.parse import urlencode

import httpx
from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from jinja2 import Environment, FileSystemLoader, select_autoescape
from starlette.concurrency import run_in_threadpool

from toposcout.compiler.errors import ToposcoutError
from toposcout.compiler.rows import DASHBOARD_COLUMNS, FIELDS
from toposcout.compiler.devices import parse_device
from toposcout.compiler.options import DEFAULT_FIDELITY_TARGET, LIMITS
from toposcout.compiler.profiles import DEFAULT_PROFILE, profile_catalogue
from toposcout.compiler.targets import BUILTIN_FAMILIES, GATE_SETS, connectivity_catalogue
from toposcout.service.web import charts

__all__ = ["router", "COOKIE", "PAGE_SIZE"]

COOKIE = "toposcout_token"
PAGE_SIZE = 20
_HERE = Path(__file__).resolve().parent
_STATIC = {"dashboard.js": "text/javascript; charset=utf-8", "dashboard.css": "text/css; charset=utf-8",
           "favicon.svg": "image/svg+xml",
           # Swagger UI for /docs, shipped in the package (see static/swagger-ui.README.txt)
           "swagger-ui-bundle.js": "text/javascript; charset=utf-8", "swagger-ui.css": "text/css; charset=utf-8",
           "swagger-ui.LICENSE": "text/plain; charset=utf-8", "swagger-ui.NOTICE": "text/plain; charset=utf-8",
           "swagger-ui-bundle.js.LICENSE.txt": "text/plain; charset=utf-8",
           "swagger-ui.README.txt": "text/plain; charset=utf-8"}
_CSP = ("default-src 'self'; img-src 'self' data:; style-src 'self'; script-src 'self'; connect-src 'self'; "
        "font-src 'self'; form-action 'self'; frame-ancestors 'none'; base-uri 'self'")
_FINAL = ("done", "failed", "cancelled")

router = APIRouter(tags=["dashboard"], include_in_schema=False)

_env = Environment(loader=FileSystemLoader(str(_HERE / "templates")), autoescape=select_autoescape(["html"]),
                   trim_blocks=True, lstrip_blocks=True)


def _fmt_num(v: Any, digits: int = 3) -> str:
    if v is None or v == "":
        return "–"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        if not math.isfinite(v):
            return str(v)
        # small figures (a large model's fidelity, a budget part) keep their significant digits
        return f"{v:.{digits}f}" if abs(v) >= 0.1 or v == 0 else f"{v:.{digits}g}"
    return str(v)


def _fmt_time(iso: str | None) -> str:
    if not iso:
        return "–"
    try:
        t = dt.datetime.fromisoformat(str(iso).replace("Z", "+00:00"))
    except ValueError:
        return str(iso)
    if t.tzinfo is not None:
        t = t.astimezone(dt.timezone.utc)
    return t.strftime("%Y-%m-%d %H:%M UTC")


_env.filters["num"] = _fmt_num
_env.filters["when"] = _fmt_time


# --- talking to the API in process ---------------------------------------------------------

def _token_of(request: Request) -> str | None:
    header = request.headers.get("authorization")
    if header and header.lower().startswith("bearer "):
        return header[7:].strip() or None
    return request.cookies.get(COOKIE)


async def _api(request: Request, method: str, path: str, **kw: Any) -> httpx.Response:
    """Replay a request on this app's JSON API as the caller (same address, same token)."""
    headers = dict(kw.pop("headers", {}) or {})
    token = _token_of(request)
    if token:
        headers["Authorization"] = f"Bearer {token}"
    client = (request.client.host, request.client.port) if request.client else ("127.0.0.1", 0)
    transport = httpx.ASGITransport(app=request.app, client=client)
    async with httpx.AsyncClient(transport=transport, base_url="http://toposcout.internal", timeout=60) as c:
        return await c.request(method, path, headers=headers, **kw)


def _detail(resp: httpx.Response) -> tuple[str, str | None]:
    try:
        data = resp.json()
    except ValueError:
        return (resp.text.strip()[:300] or resp.reason_phrase), None
    if not isinstance(data, Mapping):
        return str(data)[:300], None
    detail, field = data.get("detail"), data.get("field")
    if isinstance(detail, list) and detail:
        first = detail[0] if isinstance(detail[0], Mapping) else {"msg": str(detail[0])}
        loc = [str(x) for x in first.get("loc") or [] if x not in ("body", "query", "path")]
        return str(first.get("msg")), field or (".".join(loc) or None)
    return str(detail), field


def _page(request: Request, template: str, code: int = 200, **ctx: Any) -> HTMLResponse:
    ctx.setdefault("signed_in", bool(_token_of(request)))
    html = _env.get_template(template).render(request=request, **ctx)
    return HTMLResponse(html, status_code=code, headers={"Content-Security-Policy": _CSP})


def _problem(request: Request, resp: httpx.Response) -> Response:
    """The page for an API error: sign-in on 401, else the message with the API's status."""
    msg, field = _detail(resp)
    if resp.status_code == 401:  # an error box only when a token was tried; a visitor is not signed in
        tried = _token_of(request) is not None
        return _page(request, "signin.html", 401, message=f"the token was not accepted: {msg}" if tried else None,
                     next=str(request.url.path), signed_in=False)
    return _page(request, "error.html", resp.status_code, status=resp.status_code, message=msg, field=field)


def _with_token_cookie(request: Request) -> Response | None:
    """``?token=T``: store T in a cookie and redirect to the same page without it."""
    token = request.query_params.get("token")
    if not token:
        return None
    rest = [(k, v) for k, v in request.query_params.multi_items() if k != "token"]
    url = request.url.path + (f"?{urlencode(rest)}" if rest else "")
    resp = RedirectResponse(url, status_code=303)
    _set_cookie(request, resp, token)
    return resp


def _set_cookie(request: Request, resp: Response, token: str) -> None:
    resp.set_cookie(COOKIE, token, httponly=True, samesite="strict", secure=request.url.scheme == "https",
                    max_age=30 * 24 * 3600, path="/")


# --- static files ------------------------------------------------------------------------

@router.get("/static/{name}")
def static(name: str) -> Response:
    if name not in _STATIC:
        return Response("no such file", status_code=404, media_type="text/plain")
    return Response((_HERE / "static" / name).read_bytes(), media_type=_STATIC[name],
                    headers={"Cache-Control": "max-age=300"})


# --- sign-in -----------------------------------------------------------------------------

@router.get("/signin", response_class=HTMLResponse)
async def signin_form(request: Request, next: str = "/"):
    return _page(request, "signin.html", message=None, next=_safe_next(next))


@router.post("/signin")
async def signin(request: Request):
    form = await request.form()
    token = str(form.get("token") or "").strip()
    nxt = _safe_next(str(form.get("next") or "/"))
    if not token:
        return _page(request, "signin.html", 422, message="enter a token", next=nxt)
    resp = RedirectResponse(nxt, status_code=303)
    _set_cookie(request, resp, token)
    return resp


@router.post("/signout")
async def signout():
    resp = RedirectResponse("/", status_code=303)
    resp.delete_cookie(COOKIE, path="/")
    return resp


def _safe_next(nxt: str) -> str:
    return nxt if nxt.startswith("/") and not nxt.startswith("//") else "/"


# --- the study list ----------------------------------------------------------------------

@router.get("/", response_class=HTMLResponse)
async def study_list(request: Request):
    redirect = _with_token_cookie(request)
    if redirect:
        return redirect
    page = _positive_int(request.query_params.get("page"), 1)
    status = request.query_params.get("status") or None
    model = (request.query_params.get("model") or "").strip() or None
    label = (request.query_params.get("label") or "").strip() or None
    params: dict[str, Any] = {"limit": PAGE_SIZE, "offset": (page - 1) * PAGE_SIZE}
    for key, value in (("status", status), ("model", model), ("label", label)):
        if value:
            params[key] = value
    resp = await _api(request, "GET", "/v1/studies", params=params)
    if resp.status_code != 200:
        return _problem(request, resp)
    data = resp.json()
    total = int(data.get("total", 0))
    pages = max(1, math.ceil(total / PAGE_SIZE))
    filters = urlencode({k: v for k, v in (("status", status), ("model", model), ("label", label)) if v})
    return _page(request, "studies.html", items=data.get("items", []), total=total, page=page, pages=pages,
                 status=status, model=model or "", label=label or "", filters=filters,
                 api_url="/v1/studies?" + urlencode(params),
                 statuses=("queued", "running", "done", "failed", "cancelled"))


def _positive_int(raw: str | None, default: int) -> int:
    try:
        v = int(str(raw))
    except (TypeError, ValueError):
        return default
    return v if v >= 1 else default


#: what the compare view puts side by side, per study
_COMPARE_FIELDS = (("label", "label"), ("model_name", "model"), ("connectivities", "connectivities"),
                   ("profiles", "profiles"), ("noise_scales", "noise scales"), ("status", "status"),
                   ("created_at", "submitted"), ("best_connectivity", "best connectivity"))


@router.get("/compare", response_class=HTMLResponse)
async def compare_studies(request: Request):
    """Two or more studies side by side: the same columns, the values that differ highlighted."""
    ids = [i for v in request.query_params.getlist("ids") for i in v.replace(",", " ").split()]
    if len(ids) < 2:
        return _page(request, "error.html", 422, status=422, field="ids",
                     message="choose two or more studies to compare (tick them in the study list)")
    studies = []
    for sid in ids[:8]:
        study, problem = await _study(request, sid)
        if problem is not None:
            return problem
        studies.append(study)
    fields = []
    for key, title in _COMPARE_FIELDS:
        values = [s.get(key) for s in studies]
        fields.append((title, values, len({json.dumps(v, sort_keys=True, default=str) for v in values}) > 1))
    # per connectivity: the key figures of each study's row nearest noise scale 1
    names: list[str] = []
    per = []
    for s in studies:
        best = {str(r["connectivity"]): r for r in charts.per_connectivity(charts.usable_rows(s.get("rows") or []))}
        per.append(best)
        names += [n for n in best if n not in names]
    figures = []
    for name in names:
        for key, title in (("two_qubit_gates", "2q gates"), ("depth", "depth"), ("state_fidelity", "state fidelity"),
                           ("hellinger_fidelity", "Hellinger fidelity")):
            values = [p.get(name, {}).get(key) for p in per]
            if all(v is None for v in values):
                continue
            figures.append((f"{name}: {title}", values, len(set(values)) > 1))
    return _page(request, "compare.html", studies=studies, fields=fields, figures=figures)


# --- a study -----------------------------------------------------------------------------

async def _study(request: Request, study_id: str) -> tuple[dict | None, Response | None]:
    resp = await _api(request, "GET", f"/v1/studies/{study_id}")
    if resp.status_code != 200:
        return None, _problem(request, resp)
    return resp.json(), None


def _drawn_rows(study: Mapping[str, Any]) -> list[Mapping[str, Any]]:
    """One row per connectivity (nearest noise scale 1; the same choice as the per-connectivity charts)."""
    return charts.per_connectivity(charts.usable_rows(study.get("rows") or []))


async def _actives(request: Request, study: Mapping[str, Any]) -> dict[int, set[int] | None]:
    """Active qubits of each drawn row's compiled circuit (None where the circuit is not available)."""
    out: dict[int, set[int] | None] = {}
    for r in _drawn_rows(study):
        i = int(r["task_index"])
        q = await _api(request, "GET", f"/v1/studies/{study['id']}/circuits/{i}.qpy")
        out[i] = await run_in_threadpool(_active_qubits, q.content) if q.status_code == 200 else None
    return out


def _drawable(study: Mapping[str, Any], actives: Mapping[int, set[int] | None]) -> list[dict]:
    """The drawings of a study page with their alt text."""
    out = []
    for r in _drawn_rows(study):
        try:
            conn = charts.connectivity_for_row(r, study.get("request"))
        except ToposcoutError:
            continue
        alt = charts.drawing_description(r, conn, actives.get(int(r["task_index"])))
        out.append({"row": r, "conn": conn, "alt": alt})
    return out


_COLUMNS = [("task_index", "#"), *((k, FIELDS[k].title) for k in DASHBOARD_COLUMNS[:1]), ("status", "status"),
            *((k, FIELDS[k].title) for k in DASHBOARD_COLUMNS[1:])]
#: what each column means, shown as the header's tooltip (from the row definition)
_MEANINGS = {k: (FIELDS[k].meaning + (f" ({FIELDS[k].unit})" if FIELDS[k].unit else ""))
             for k in (*DASHBOARD_COLUMNS, "family", "angles_fitted", "fit_loss_value", "kl_target_ideal",
                       "kl_target_noisy")}


def _study_context(study: dict, actives: Mapping[int, set[int] | None]) -> dict:
    rows = study.get("rows") or []
    kinds = charts.available_charts(rows)
    cols = [(k, h) for k, h in _COLUMNS if k in ("task_index", "connectivity", "status")
            or any(r.get(k) is not None for r in rows)]
    if len({r.get("family") for r in rows if r.get("family")}) > 1:  # a family comparison: side by side
        cols.insert(2, ("family", FIELDS["family"].title))
        rows = sorted(rows, key=lambda r: (str(r.get("connectivity")), r.get("noise_scale") or 0,
                                           str(r.get("family"))))
    if any(r.get("angles_fitted") for r in rows):
        cols += [(k, FIELDS[k].title) for k in ("angles_fitted", "fit_loss_value", "kl_target_ideal", "kl_target_noisy")
                 if any(r.get(k) is not None for r in rows)]
    req = study.get("request") or {}
    profile = next((r.get("profile") for r in rows if r.get("profile")), None) or req.get("profile")
    return dict(study=study, rows=rows, columns=cols, meanings=_MEANINGS, kinds=kinds, titles=charts.CHART_TITLES,
                alts={k: charts.chart_description(k, rows) for k in kinds}, drawings=_drawable(study, actives),
                final=study.get("status") in _FINAL, profile=profile,
                compile_only=bool(req.get("compile_only")), caption=charts.caption(rows, kind="fidelity"))


@router.get("/studies/{study_id}", response_class=HTMLResponse)
async def study_page(request: Request, study_id: str):
    redirect = _with_token_cookie(request)
    if redirect:
        return redirect
    study, problem = await _study(request, study_id)
    if problem:
        return problem
    ctx = await run_in_threadpool(_study_context, study, await _actives(request, study))
    return _page(request, "study.html", **ctx)


@router.get("/studies/{study_id}/live", response_class=HTMLResponse)
async def study_live(request: Request, study_id: str):
    """The changing part of a study page (status, table, charts), fetched by the page's script."""
    study, problem = await _study(request, study_id)
    if problem:
        return problem
    ctx = await run_in_threadpool(_study_context, study, await _actives(request, study))
    return _page(request, "_study_live.html", **ctx)


class _ChartCache:
    """Rendered charts by (study, last update, chart, format); a study that changes gets new keys."""

    def __init__(self, size: int = 256):
        self._d: OrderedDict[tuple, bytes] = OrderedDict()
        self._size = size
        self._lock = Lock()

    def get(self, key: tuple) -> bytes | None:
        with self._lock:
            v = self._d.get(key)
            if v is not None:
                self._d.move_to_end(key)
            return v

    def put(self, key: tuple, value: bytes) -> None:
        with self._lock:
            self._d[key] = value
            self._d.move_to_end(key)
            while len(self._d) > self._size:
                self._d.popitem(last=False)


_cache = _ChartCache()
_MEDIA = {"svg": "image/svg+xml", "png": "image/png"}


def _split(name: str) -> tuple[str, str]:
    stem, _, fmt = name.rpartition(".")
    return (stem, fmt) if stem else (name, "")


def _image(body: bytes, fmt: str, filename: str, download: bool) -> Response:
    headers = {"Cache-Control": "no-cache"}
    if download:
        headers["Content-Disposition"] = f'attachment; filename="{filename}"'
    return Response(body, media_type=_MEDIA[fmt], headers=headers)


def _bad(request: Request, message: str, field: str, status: int = 404) -> Response:
    return _page(request, "error.html", status, status=status, message=message, field=field)


@router.get("/studies/{study_id}/charts/{name}")
async def chart(request: Request, study_id: str, name: str, download: bool = False):
    kind, fmt = _split(name)
    if fmt not in _MEDIA:
        return _bad(request, f"unknown chart format {fmt!r}; ask for {kind}.svg or {kind}.png", "format")
    study, problem = await _study(request, study_id)
    if problem:
        return problem
    key = (study_id, study.get("updated_at"), kind, fmt)
    body = _cache.get(key)
    if body is None:
        try:
            body = await run_in_threadpool(charts.render_chart, kind, study.get("rows") or [], fmt=fmt)
        except ToposcoutError as exc:
            return _bad(request, str(exc), exc.field or "chart")
        _cache.put(key, body)
    return _image(body, fmt, f"{study_id[:8]}-{kind}.{fmt}", download)


@router.get("/studies/{study_id}/drawings/{name}")
async def drawing(request: Request, study_id: str, name: str, download: bool = False):
    stem, fmt = _split(name)
    if fmt not in _MEDIA:
        return _bad(request, f"unknown drawing format {fmt!r}; ask for {stem}.svg or {stem}.png", "format")
    try:
        index = int(stem)
    except ValueError:
        return _bad(request, f"a drawing is named by its row's task index, e.g. 0.svg, not {name!r}", "task_index")
    study, problem = await _study(request, study_id)
    if problem:
        return problem
    row = next((r for r in study.get("rows") or [] if r.get("task_index") == index), None)
    if row is None or not charts.usable_rows([row]):
        return _bad(request, f"study {study_id} has no finished row {index} to draw", "task_index")
    key = (study_id, study.get("updated_at"), f"drawing-{index}", fmt)
    body = _cache.get(key)
    if body is None:
        active = None
        q = await _api(request, "GET", f"/v1/studies/{study_id}/circuits/{index}.qpy")
        if q.status_code == 200:
            active = await run_in_threadpool(_active_qubits, q.content)
        try:
            req = study.get("request") or {}
            if req.get("device") and fmt == "svg":  # the chip at its coordinates, shaded by error

                body = charts.device_svg(parse_device(req["device"]), row).encode("utf-8")
            else:
                conn = charts.connectivity_for_row(row, study.get("request"))
                body = await run_in_threadpool(lambda: charts.connectivity_chart(row, conn, active=active, fmt=fmt))
        except ToposcoutError as exc:
            return _bad(request, str(exc), exc.field or "connectivity")
        _cache.put(key, body)
    return _image(body, fmt, f"{study_id[:8]}-{row.get('connectivity')}.{fmt}", download)


def _active_qubits(qpy_bytes: bytes) -> set[int] | None:
    """Physical qubits a compiled circuit touches (not counting barriers and delays)."""
    from qiskit import qpy  # qiskit only when a circuit is loaded

    try:
        circ = qpy.load(io.BytesIO(qpy_bytes))[0]
    except Exception:  # a blob qiskit cannot read: fall back to the layout guess
        return None
    act: set[int] = set()
    for ins in circ.data:
        if ins.operation.name in ("barrier", "delay"):
            continue
        act.update(circ.find_bit(q).index for q in ins.qubits)
    return act


# --- the submit form ---------------------------------------------------------------------

def _form_choices() -> dict:
    profiles = profile_catalogue()
    cat = connectivity_catalogue()
    return dict(limits=LIMITS, default_fidelity_target=DEFAULT_FIDELITY_TARGET,
                families=[(f, cat[f]["description"]) for f in BUILTIN_FAMILIES], gate_sets=GATE_SETS,
                profiles=profiles, default_profile=DEFAULT_PROFILE,
                strategies=("auto", "generic", "structured"))


_FORM_DEFAULTS = {"connectivities": ["line", "grid", "all-to-all"], "extra_connectivities": "", "profiles": [], "label": "",
                  "noise_scales": "1", "fidelity_target": "", "compile_only": False, "gate_set": "",
                  "strategy": "auto", "seeds": "5", "layers": "1", "families": ["clique"], "fit": False}


@router.get("/submit", response_class=HTMLResponse)
async def submit_form(request: Request):
    redirect = _with_token_cookie(request)
    if redirect:
        return redirect
    return _page(request, "submit.html", values=_FORM_DEFAULTS, errors={}, kept=None, **_form_choices())


def _form_field(api_field: str | None) -> str:
    """The submit form's field for an API error field (``noise_scales[1]`` → ``noise_scales``)."""
    f = api_field or ""
    head = f.split(".", 1)[0].split("[", 1)[0]
    if head in ("file", "model", "body") or f.startswith("line"):
        return "file"
    if head in ("connectivities", "connectivity"):
        return "connectivities"
    if head in ("noise_scales", "noise_scale"):
        return "noise_scales"
    if head in ("seeds", "layers", "fidelity_target", "profile", "gate_set", "strategy", "compile_only", "device",
                "fit", "families", "label"):
        return head
    return "form"


def _check_form(values: dict, device_chosen: bool = False) -> dict[str, str]:
    """Every problem of the filled fields at once, by field, with the limits of compiler.options."""

    errors: dict[str, str] = {}
    for key in ("seeds", "layers"):
        v = values[key].strip()
        if not v:
            continue
        try:
            LIMITS[key].check(int(v))
        except ValueError:
            errors[key] = f"{key}: {v[:40]!r} is not a whole number; give {LIMITS[key].describe()}"
        except ToposcoutError as exc:
            errors[key] = str(exc)
    v = values["fidelity_target"].strip()
    if v:
        try:
            LIMITS["fidelity_target"].check(float(v))
        except ValueError:
            errors["fidelity_target"] = f"fidelity_target: {v[:40]!r} is not a number"
        except ToposcoutError as exc:
            errors["fidelity_target"] = str(exc)
    bad = []
    for x in values["noise_scales"].replace(",", " ").split():
        try:
            LIMITS["noise_scale"].check(float(x))
        except (ValueError, ToposcoutError):
            bad.append(x[:20])
    if bad:
        errors["noise_scales"] = (f"noise scales: {', '.join(repr(b) for b in bad)} not "
                                  f"{LIMITS['noise_scale'].describe()}")
    if not device_chosen and not values["connectivities"] and not values["extra_connectivities"].strip():
        errors["connectivities"] = "choose at least one connectivity"
    return errors


@router.post("/submit")
async def submit(request: Request):
    form = await request.form()
    upload = form.get("file")
    values = {
        "connectivities": [str(v) for v in form.getlist("connectivities")],
        "extra_connectivities": str(form.get("extra_connectivities") or ""),
        "profiles": [str(v) for v in form.getlist("profile") if str(v)],
        "label": str(form.get("label") or ""),
        "noise_scales": str(form.get("noise_scales") or ""),
        "fidelity_target": str(form.get("fidelity_target") or ""),
        "compile_only": bool(form.get("compile_only")),
        "gate_set": str(form.get("gate_set") or "cx"),
        "strategy": str(form.get("strategy") or "auto"),
        "seeds": str(form.get("seeds") or ""),
        "layers": str(form.get("layers") or ""),
        "families": [str(v) for v in form.getlist("families")],
        "fit": bool(form.get("fit")),
    }

    # a refused form keeps the chosen file: its content comes back in a hidden field (a browser cannot
    # refill a file input), used unless another file is chosen
    kept: dict[str, str] | None = None
    errors: dict[str, str] = {}
    content, filename, ctype = b"", "", "application/octet-stream"
    if upload is not None and hasattr(upload, "read") and getattr(upload, "filename", ""):
        content, filename = await upload.read(), upload.filename
        ctype = upload.content_type or ctype
        if not content:
            errors["file"] = f"the model file {filename!r} is empty"
    elif form.get("kept_file_b64"):
        try:
            content = base64.b64decode(str(form.get("kept_file_b64")), validate=True)
        except (binascii.Error, ValueError):
            content = b""
        filename = str(form.get("kept_file_name") or "model")
        if not content:
            errors["file"] = "choose the model file again"
    else:
        errors["file"] = "choose a model file (our JSON format, UAI or networkx node-link JSON)"
    if content:
        kept = {"name": filename, "b64": base64.b64encode(content).decode("ascii")}

    def again(found: dict[str, str], status: int = 422) -> Response:
        return _page(request, "submit.html", status, values=values, errors=found, kept=kept, **_form_choices())

    device_chosen = bool(getattr(form.get("device_file"), "filename", ""))
    errors.update(_check_form(values, device_chosen))
    if errors:
        return again(errors)
    conns = values["connectivities"] + [c for c in values["extra_connectivities"].replace(",", " ").split() if c]
    data: dict[str, Any] = {"connectivities": conns,
                            "noise_scales": values["noise_scales"].replace(",", " ").split()}
    for key in ("label", "fidelity_target", "gate_set", "strategy", "seeds", "layers"):
        if values[key].strip():
            data[key] = values[key].strip()
    if values["profiles"]:  # several: one study holds rows per profile
        data["profile"] = values["profiles"]
    device = form.get("device_file")
    if device is not None and hasattr(device, "read") and getattr(device, "filename", ""):
        try:
            data["device"] = (await device.read()).decode("utf-8")
        except UnicodeDecodeError:
            return again({"device": f"the device file {device.filename!r} is not UTF-8 text"})
        data.pop("connectivities", None)  # a device fixes the connectivity and the figures
        data.pop("profile", None)
    data["compile_only"] = "true" if values["compile_only"] else "false"
    if values["families"]:
        data["families"] = values["families"]
    if values["fit"]:
        data["fit"] = "kl"
    data = {k: v for k, v in data.items() if v != []}
    resp = await _api(request, "POST", "/v1/studies", data=data, files={"file": (filename, content, ctype)})
    if resp.status_code in (200, 201, 202):
        return RedirectResponse(f"/studies/{resp.json()['id']}", status_code=303)
    if resp.status_code == 401:
        return _problem(request, resp)
    message, field = _detail(resp)
    return again({_form_field(field): message}, resp.status_code if 400 <= resp.status_code < 500 else 422)


def _json_attr(value: Any) -> str:
    return json.dumps(value, separators=(",", ":"))


_env.filters["json"] = _json_attr
