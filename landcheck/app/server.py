"""The web application (Starlette): pages, JSON API, uploads, downloads; safety checks on every request.

* Every request's Host must be one the server was started for (no DNS rebinding), via Starlette's
  TrustedHostMiddleware.
* Every state-changing request (POST) must carry the page's token in the ``X-Landcheck-Token`` header;
  another site cannot read the page, so it cannot send the token.
* Files are read and written only inside the workspace (:meth:`Workspace.inside`).
"""

from __future__ import annotations

import contextlib
import csv
import hashlib
import html
import json
import os
import secrets
import tempfile
import zipfile
from importlib import resources
from pathlib import Path

from starlette.applications import Starlette
from starlette.concurrency import run_in_threadpool
from starlette.middleware import Middleware
from starlette.middleware.trustedhost import TrustedHostMiddleware
from starlette.requests import Request
from starlette.responses import FileResponse, HTMLResponse, JSONResponse, PlainTextResponse
from starlette.routing import Mount, Route
from starlette.staticfiles import StaticFiles

from landcheck.about import CAUTION, __version__

from .rulebook_form import RULEBOOK_NAME, check_text, from_toml, to_toml
from .runs import RunManager
from .uploads import UploadRefused, receive_file, store_input
from .workspace import OutsideWorkspace, Workspace, utc_now

__all__ = ["create_app", "TOKEN_HEADER"]

TOKEN_HEADER = "x-landcheck-token"
MAX_JSON_BYTES = 1 << 20
_SAFE_METHODS = ("GET", "HEAD", "OPTIONS")
_ROLES = ("dem", "parcels", "hazard")
_PAGE_CSP = (
    "default-src 'self'; img-src 'self' data:; style-src 'self'; script-src 'self'; frame-src 'self'; "
    "connect-src 'self'; object-src 'none'; base-uri 'none'; form-action 'self'; frame-ancestors 'none'"
)
# run outputs (the report) are shown sandboxed: their scripts run, but cannot reach the app's API
_FILE_CSP = "sandbox allow-scripts allow-popups allow-downloads; frame-ancestors 'self'"


def _err(msg: str, status: int = 400) -> JSONResponse:
    return JSONResponse({"error": msg}, status_code=status)


class _Guard:
    """ASGI middleware: a token on every state-changing request; security headers on every answer."""

    def __init__(self, app, token: str):
        self.app = app
        self.token = token.encode()

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            return await self.app(scope, receive, send)
        if scope["method"] not in _SAFE_METHODS:
            got = dict(scope["headers"]).get(TOKEN_HEADER.encode(), b"")
            if not secrets.compare_digest(got, self.token):
                resp = _err("missing or wrong request token; reload the page and try again.", 403)
                return await resp(scope, receive, send)
        is_file = scope["path"].startswith("/runs/")

        async def send_wrapped(message):
            if message["type"] == "http.response.start":
                headers = list(message.get("headers", []))
                headers.append((b"x-content-type-options", b"nosniff"))
                headers.append((b"referrer-policy", b"no-referrer"))
                headers.append((b"content-security-policy", (_FILE_CSP if is_file else _PAGE_CSP).encode()))
                if not is_file:
                    headers.append((b"x-frame-options", b"DENY"))
                message = dict(message, headers=headers)
            await send(message)

        return await self.app(scope, receive, send_wrapped)


def create_app(
    workspace: str | os.PathLike,
    *,
    max_upload_bytes: int = 2 * 1024**3,
    allowed_hosts: list[str] | None = None,
    token: str | None = None,
) -> Starlette:
    """Build the app over a workspace folder (created when missing)."""
    ws = Workspace(workspace)
    runs = RunManager(ws)
    token = token or secrets.token_urlsafe(32)
    static_dir = Path(str(resources.files("landcheck.app") / "static"))
    index_html = (static_dir / "index.html").read_text(encoding="utf-8")
    map_cache: dict[int, dict] = {}

    # ------------------------------------------------------------------ helpers
    def project_or_404(pid: int) -> dict:
        p = ws.project(pid)
        if p is None:
            raise _NotFound(f"no project {pid}")
        return p

    def run_or_404(rid: int) -> dict:
        r = ws.one("SELECT * FROM runs WHERE id = ?", (rid,))
        if r is None:
            raise _NotFound(f"no run {rid}")
        return r

    async def json_body(request: Request) -> dict:
        body = b""
        async for chunk in request.stream():
            body += chunk
            if len(body) > MAX_JSON_BYTES:
                raise UploadRefused("request too large", 413)
        try:
            data = json.loads(body or b"{}")
        except ValueError:
            raise UploadRefused("expected a JSON body") from None
        if not isinstance(data, dict):
            raise UploadRefused("expected a JSON object")
        return data

    def layer_files(pid: int) -> dict[str, str]:
        base = ws.inputs_dir(pid).resolve()
        return {
            r["info"]["key"]: str((ws.root / r["path"]).resolve().relative_to(base))
            for r in ws.active_inputs(pid)
            if r["role"] == "hazard"
        }

    def run_view(r: dict) -> dict:
        out = dict(r)
        for k in ("options", "made_from", "summary"):
            out[k] = json.loads(r[k]) if r.get(k) else None
        out["live"] = runs.live(r["id"])  # kept after the end while the app runs: the finished bars
        out["outputs"] = (
            ws.q("SELECT path, size, sha256 FROM outputs WHERE run_id = ? ORDER BY path", (r["id"],))
            if r["state"] == "done"
            else []
        )
        rb = ws.one("SELECT version, sha256 FROM rulebooks WHERE id = ?", (r["rulebook_id"],))
        out["rulebook_version"] = rb["version"] if rb else None
        return out

    def output_dir(r: dict) -> Path:
        if r["state"] != "done":
            raise _NotFound("this run has no published output")
        return ws.inside(ws.run_dir(r["project_id"], r["id"]) / "output")

    # ------------------------------------------------------------------ pages
    async def index(request: Request):
        page = (
            index_html.replace("{{TOKEN}}", html.escape(token))
            .replace("{{CAUTION}}", html.escape(CAUTION))
            .replace("{{VERSION}}", html.escape(__version__))
        )
        return HTMLResponse(page, headers={"cache-control": "no-store"})

    # ------------------------------------------------------------------ projects and inputs
    async def list_projects(request: Request):
        rows = ws.q(
            "SELECT p.*, (SELECT COUNT(*) FROM runs r WHERE r.project_id = p.id) AS runs FROM projects p ORDER BY p.id DESC"
        )
        return JSONResponse({"projects": rows, "caution": CAUTION})

    async def new_project(request: Request):
        data = await json_body(request)
        name = str(data.get("name", "")).strip()[:120]
        if not name:
            return _err("give the project a name.")
        pid = ws.new_project(name)
        return JSONResponse({"id": pid, "name": name})

    async def get_project(request: Request):
        pid = int(request.path_params["pid"])
        p = project_or_404(pid)
        rbs = ws.q(
            "SELECT id, version, sha256, created_utc FROM rulebooks WHERE project_id = ? ORDER BY version", (pid,)
        )
        latest = ws.one("SELECT text FROM rulebooks WHERE project_id = ? ORDER BY version DESC LIMIT 1", (pid,))
        rs = [run_view(r) for r in ws.q("SELECT * FROM runs WHERE project_id = ? ORDER BY id DESC", (pid,))]
        for r in rs:
            r.pop("outputs", None)
        return JSONResponse(
            {
                "project": p,
                "inputs": ws.active_inputs(pid),
                "rulebooks": rbs,
                "latest_rulebook": latest["text"] if latest else None,
                "runs": rs,
                "layer_files": layer_files(pid),
            }
        )

    async def upload(request: Request):
        pid = int(request.path_params["pid"])
        role = request.path_params["role"]
        project_or_404(pid)
        if role not in _ROLES:
            return _err(f"unknown input role {role!r}; use one of {', '.join(_ROLES)}", 404)
        inputs = ws.inside(ws.inputs_dir(pid))
        incoming = inputs / ".incoming"
        rec = await receive_file(request, incoming, max_upload_bytes)
        target, meta = await run_in_threadpool(store_input, rec, inputs, role, max_upload_bytes)
        ws.inside(target)  # belt and braces: never record a path outside the workspace
        iid = ws.add_input(pid, role, rec.name, target, rec.sha256, meta["options"], meta["info"])
        return JSONResponse({"id": iid, "name": rec.name, "size": rec.size, "sha256": rec.sha256, **meta})

    # ------------------------------------------------------------------ rulebook
    async def render_rulebook(request: Request):
        pid = int(request.path_params["pid"])
        project_or_404(pid)
        data = await json_body(request)
        try:
            text = to_toml(data.get("state") or {})
        except ValueError as exc:
            return JSONResponse({"toml": "", "ok": False, "message": f"{RULEBOOK_NAME}: {exc}"})
        rules, msg = check_text(text, ws.inputs_dir(pid), layer_files(pid))
        return JSONResponse({"toml": text, "ok": rules is not None, "message": msg})

    async def load_rulebook(request: Request):
        pid = int(request.path_params["pid"])
        project_or_404(pid)
        data = await json_body(request)
        text = str(data.get("text", ""))
        from landcheck.errors import RuleFileError

        try:
            state = from_toml(text)
        except RuleFileError as exc:
            return JSONResponse({"ok": False, "message": str(exc), "state": None, "toml": text})
        rules, msg = check_text(text, ws.inputs_dir(pid), layer_files(pid))
        return JSONResponse({"ok": rules is not None, "message": msg, "state": state, "toml": text})

    def save_rulebook(pid: int, text: str) -> dict:
        sha = hashlib.sha256(text.encode("utf-8")).hexdigest()
        last = ws.one("SELECT * FROM rulebooks WHERE project_id = ? ORDER BY version DESC LIMIT 1", (pid,))
        if last is not None and last["sha256"] == sha:
            return last
        version = (last["version"] + 1) if last else 1
        path = ws.inside(ws.inputs_dir(pid) / f"rulebook-v{version}.toml")
        fd, tmp = tempfile.mkstemp(prefix=".rulebook-", dir=path.parent)
        with os.fdopen(fd, "wb") as f:
            f.write(text.encode("utf-8"))
        os.replace(tmp, path)
        rid = ws.x(
            "INSERT INTO rulebooks (project_id, version, path, text, sha256, created_utc) VALUES (?, ?, ?, ?, ?, ?)",
            (pid, version, ws.rel(path), text, sha, utc_now()),
        )
        return ws.one("SELECT * FROM rulebooks WHERE id = ?", (rid,))

    async def post_rulebook(request: Request):
        pid = int(request.path_params["pid"])
        project_or_404(pid)
        text = str((await json_body(request)).get("text", ""))
        rules, msg = check_text(text, ws.inputs_dir(pid), layer_files(pid))
        if rules is None:
            return _err(msg)
        rb = save_rulebook(pid, text)
        return JSONResponse({"id": rb["id"], "version": rb["version"], "sha256": rb["sha256"]})

    async def get_rulebook_file(request: Request):
        pid = int(request.path_params["pid"])
        v = int(request.path_params["version"])
        rb = ws.one("SELECT * FROM rulebooks WHERE project_id = ? AND version = ?", (pid, v))
        if rb is None:
            raise _NotFound(f"no rulebook version {v}")
        return PlainTextResponse(
            rb["text"],
            media_type="application/toml",
            headers={"content-disposition": f'attachment; filename="rulebook-v{v}.toml"'},
        )

    # ------------------------------------------------------------------ runs
    async def new_run(request: Request):
        pid = int(request.path_params["pid"])
        project_or_404(pid)
        data = await json_body(request)
        text = str(data.get("rulebook", ""))
        rules, msg = check_text(text, ws.inputs_dir(pid), layer_files(pid))
        if rules is None:
            return _err(msg)
        try:
            opts = _run_options(data.get("options") or {})
        except ValueError as exc:
            return _err(str(exc))
        act = {r["role"]: r for r in ws.active_inputs(pid) if r["role"] != "hazard"}
        missing = [k for k in ("dem", "parcels") if k not in act]
        if missing:
            return _err(
                f"upload the {' and the '.join('DEM' if m == 'dem' else 'parcel layer' for m in missing)} first."
            )
        rb = save_rulebook(pid, text)
        used_layers = {str(Path(p).resolve()) for p in rules.layers.values()}
        made = [
            {"role": r["role"], "name": r["name"], "path": r["path"], "sha256": r["sha256"], "options": r["options"]}
            for r in ws.active_inputs(pid)
            if r["role"] != "hazard" or str((ws.root / r["path"]).resolve()) in used_layers
        ]
        made_from = {
            "inputs": made,
            "rulebook": {"version": rb["version"], "sha256": rb["sha256"], "path": rb["path"]},
            "options": opts,
            "landcheck": __version__,
        }
        rid = ws.x(
            "INSERT INTO runs (project_id, rulebook_id, state, options, made_from, created_utc) VALUES (?, ?, 'queued', ?, ?, ?)",
            (pid, rb["id"], json.dumps(opts), json.dumps(made_from), utc_now()),
        )
        rd = ws.inside(ws.run_dir(pid, rid))
        rd.mkdir(parents=True)
        d, p = act["dem"], act["parcels"]
        job = {
            "dem": str(ws.root / d["path"]),
            "dem_band": int(d["options"]["band"]) if d["options"].get("band") else None,
            "dem_crs": d["options"].get("crs"),
            "z_unit": d["options"].get("z_unit", "m"),
            "parcels": str(ws.root / p["path"]),
            "parcels_layer": p["options"].get("layer"),
            "parcels_crs": p["options"].get("crs"),
            "rulebook": str(ws.root / rb["path"]),
            "options": opts,
        }
        (rd / "job.json").write_text(json.dumps(job, indent=1), encoding="utf-8")
        runs.submit(pid, rid)
        return JSONResponse({"id": rid, "state": ws.one("SELECT state FROM runs WHERE id = ?", (rid,))["state"]})

    async def get_run(request: Request):
        return JSONResponse(run_view(run_or_404(int(request.path_params["rid"]))))

    async def cancel_run(request: Request):
        rid = int(request.path_params["rid"])
        run_or_404(rid)
        return JSONResponse({"state": runs.cancel(rid)})

    async def run_parcels(request: Request):
        r = run_or_404(int(request.path_params["rid"]))
        f = output_dir(r) / "parcels.csv"
        with open(f, newline="", encoding="utf-8") as fh:
            rows = list(csv.DictReader(fh))
        return JSONResponse({"rows": rows, "columns": list(rows[0].keys()) if rows else []})

    async def run_map(request: Request):
        rid = int(request.path_params["rid"])
        r = run_or_404(rid)
        if rid not in map_cache:
            map_cache[rid] = await run_in_threadpool(_parcel_map, output_dir(r) / "parcels.gpkg")
        return JSONResponse(map_cache[rid])

    async def run_file(request: Request):
        r = run_or_404(int(request.path_params["rid"]))
        base = output_dir(r)
        rel = request.path_params["path"]
        try:
            full = ws.inside(rel, base)
        except OutsideWorkspace:
            return _err("that file is not part of this run's output.", 404)
        if not full.is_file():
            return _err("no such file in this run's output.", 404)
        return FileResponse(full)

    async def run_zip(request: Request):
        r = run_or_404(int(request.path_params["rid"]))
        base = output_dir(r)
        rd = ws.run_dir(r["project_id"], r["id"])
        target = rd / "output.zip"
        if not target.exists():
            await run_in_threadpool(_zip_folder, base, target, f"landcheck-run-{r['id']}")
        return FileResponse(target, filename=f"landcheck-run-{r['id']}.zip", media_type="application/zip")

    # ------------------------------------------------------------------ errors and lifespan
    async def on_refused(request: Request, exc: UploadRefused):
        return _err(str(exc), exc.status)

    async def on_not_found(request: Request, exc: _NotFound):
        return _err(str(exc), 404)

    async def on_outside(request: Request, exc: OutsideWorkspace):
        return _err("that path is outside the workspace; refused.", 400)

    @contextlib.asynccontextmanager
    async def lifespan(app):
        runs.recover()
        try:
            yield
        finally:
            await run_in_threadpool(runs.shutdown)
            ws.close()

    def pid_route(path, ep, methods=("GET",)):
        return Route(path, ep, methods=list(methods))

    routes = [
        Route("/", index),
        Mount("/static", app=StaticFiles(directory=static_dir), name="static"),
        Route("/api/projects", list_projects),
        Route("/api/projects", new_project, methods=["POST"]),
        pid_route("/api/projects/{pid:int}", get_project),
        pid_route("/api/projects/{pid:int}/inputs/{role}", upload, ("POST",)),
        pid_route("/api/projects/{pid:int}/rulebook/render", render_rulebook, ("POST",)),
        pid_route("/api/projects/{pid:int}/rulebook/load", load_rulebook, ("POST",)),
        pid_route("/api/projects/{pid:int}/rulebooks", post_rulebook, ("POST",)),
        pid_route("/api/projects/{pid:int}/rulebooks/{version:int}.toml", get_rulebook_file),
        pid_route("/api/projects/{pid:int}/runs", new_run, ("POST",)),
        Route("/api/runs/{rid:int}", get_run),
        Route("/api/runs/{rid:int}/cancel", cancel_run, methods=["POST"]),
        Route("/api/runs/{rid:int}/parcels", run_parcels),
        Route("/api/runs/{rid:int}/map", run_map),
        Route("/runs/{rid:int}/download.zip", run_zip),
        Route("/runs/{rid:int}/files/{path:path}", run_file),
    ]
    middleware = [Middleware(_Guard, token=token)]
    if allowed_hosts:
        middleware.insert(0, Middleware(TrustedHostMiddleware, allowed_hosts=allowed_hosts))
    app = Starlette(
        routes=routes,
        middleware=middleware,
        exception_handlers={UploadRefused: on_refused, _NotFound: on_not_found, OutsideWorkspace: on_outside},
        lifespan=lifespan,
    )
    app.state.workspace = ws
    app.state.runs = runs
    app.state.token = token
    return app


class _NotFound(LookupError):
    pass


def _run_options(o: dict) -> dict:
    """Check the run form's options; ValueError with a message a person can act on."""
    from landcheck.terrain.slope_classes import BUILTIN_SCHEMES as SCHEMES

    out: dict = {}
    conf = o.get("confidence", "off")
    if conf not in ("off", "rulebook", "custom"):
        raise ValueError("confidence: choose off, from the rulebook, or custom.")
    out["confidence"] = conf
    if conf == "custom":
        for k, lo in (("rmse_m", 0.0), ("corr_length_m", 0.0)):
            try:
                v = float(o.get(k) or (0 if k == "corr_length_m" else "nan"))
            except (TypeError, ValueError):
                raise ValueError(f"{k}: give a number in metres.") from None
            if not (v >= lo) or (k == "rmse_m" and v <= 0):
                raise ValueError(f"{k}: got {o.get(k)!r}; give a positive number of metres.")
            out[k] = v
        try:
            out["realizations"] = int(o.get("realizations") or 100)
            out["seed"] = int(o.get("seed") or 0)
        except (TypeError, ValueError):
            raise ValueError("realizations and seed: give whole numbers.") from None
    scheme = str(o.get("capability_scheme") or "").strip()
    if scheme:
        if "," in scheme:
            try:
                out["capability_scheme"] = [float(b) for b in scheme.split(",")]
            except ValueError:
                raise ValueError(f"capability map {scheme!r}: give a scheme name or breaks like 8,18,30.") from None
        elif scheme not in SCHEMES:
            raise ValueError(f"capability map {scheme!r}: choose one of {', '.join(SCHEMES)} or breaks like 8,18,30.")
        else:
            out["capability_scheme"] = scheme
    mmu = o.get("draft_mmu_m2")
    if mmu not in (None, ""):
        try:
            out["draft_mmu_m2"] = float(mmu)
        except (TypeError, ValueError):
            raise ValueError("minimum mapping unit: give an area in m².") from None
        if out["draft_mmu_m2"] < 0:
            raise ValueError("minimum mapping unit: give 0 or a positive area in m².")
    pre = str(o.get("prescreen_parcel") or "").strip()
    if pre:
        out["prescreen_parcel"] = pre[:100]
    tile = o.get("tile_cells") or 1024
    try:
        out["tile_cells"] = int(tile)
    except (TypeError, ValueError):
        raise ValueError("tile size: give a whole number of cells (at least 16).") from None
    if out["tile_cells"] < 16:
        raise ValueError("tile size: give at least 16 cells.")
    return out


def _parcel_map(gpkg: Path, max_parcels: int = 50_000) -> dict:
    """Parcels as SVG path data in a y-down view box, simplified to about a thousandth of the extent."""
    import geopandas as gpd
    import shapely

    gdf = gpd.read_file(gpkg, engine="pyogrio")
    xmin, ymin, xmax, ymax = (float(v) for v in gdf.total_bounds)
    tol = max(xmax - xmin, ymax - ymin) / 2000.0
    shapes = []
    for pid, verdict, cls, geom in zip(gdf["parcel_id"], gdf["verdict"], gdf["class_name"], gdf.geometry.values):
        if len(shapes) >= max_parcels:
            break
        if geom is None or geom.is_empty:
            continue
        g = shapely.simplify(geom, tol, preserve_topology=True)
        parts = []
        polys = getattr(g, "geoms", [g])
        for poly in polys:
            if poly.geom_type != "Polygon":
                continue
            for ring in [poly.exterior, *poly.interiors]:
                pts = shapely.get_coordinates(ring)
                parts.append("M" + "L".join(f"{x - xmin:.1f},{ymax - y:.1f}" for x, y in pts[:-1]) + "Z")
        shapes.append({"id": str(pid), "verdict": str(verdict), "class_name": str(cls), "d": "".join(parts)})
    return {"width": xmax - xmin, "height": ymax - ymin, "shapes": shapes, "truncated": len(gdf) > len(shapes)}


def _zip_folder(folder: Path, target: Path, top: str) -> None:
    """Zip a run's output folder; written beside the target and renamed when complete."""
    fd, tmp = tempfile.mkstemp(prefix=".zip-", dir=target.parent)
    os.close(fd)
    try:
        with zipfile.ZipFile(tmp, "w", zipfile.ZIP_DEFLATED) as zf:
            for p in sorted(folder.rglob("*")):
                if p.is_file():
                    zf.write(p, f"{top}/{p.relative_to(folder)}")
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
