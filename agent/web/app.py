"""The live page as a Starlette app: Fleet now, Unit, Event log; each with a JSON twin.

Every request opens its own read-only connection to the store (SQLite ``query_only``,
PostgreSQL read-only transactions), so the app cannot write to it and threads share
nothing but the figure cache.
"""

from __future__ import annotations

import io
import math
import tempfile
import threading
import time
import zipfile
from collections import OrderedDict
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from starlette.applications import Starlette
from starlette.exceptions import HTTPException
from starlette.requests import Request
from starlette.responses import HTMLResponse, JSONResponse, Response
from starlette.routing import Mount, Route
from starlette.staticfiles import StaticFiles

from agent import __version__
from agent.render import pages
from agent.render.figures import Figure
from agent.report.fleet import fleet_report
from agent.report.now import fleet_now
from agent.store.comtrade import write_comtrade
from agent.store.db import StoreError
from agent.store.recorder import RecorderStore
from agent.verdicts import INDICATIVE
from agent.web.auth import Auth, RequireAuth, SecurityHeaders
from agent.web.openapi import openapi_document

API = "/api/v1"
NAV = (("Units now", "/"), ("Event log", "/events"), ("API", f"{API}/openapi.json"))
#: Unit figures cover this much history before now [s] (a week: the EN 50160 assessment
#: period, and what a property manager scrolls back through).
PERIOD_S = 7 * 86400.0
_FIGURE_CACHE_SIZE = 256
_FIGURE_TTL_S = 300.0


def json_safe(value: Any) -> Any:
    """NaN/inf → None, tuples → lists, keys → str: what strict JSON can carry."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_safe(v) for v in value]
    if isinstance(value, Path):
        return str(value)
    return value


def open_read_only(url: str, captures_dir: str | Path) -> RecorderStore:
    """The store without migrations, in read-only mode where the engine allows."""
    store = RecorderStore(url, captures_dir, migrate=False)
    if store.db.dialect == "sqlite":
        store.db.execute("PRAGMA query_only = ON")
    else:
        store.db.execute("SET default_transaction_read_only = on")
    return store


def parse_time(text: str | None, name: str) -> float | None:
    """A query's time: UTC seconds or ISO 8601 (UTC unless it says otherwise)."""
    if text is None or not text.strip():
        return None
    t = text.strip()
    try:
        value = float(t)
    except ValueError:
        try:
            when = datetime.fromisoformat(t.replace("Z", "+00:00").replace("z", "+00:00"))
        except ValueError:
            raise HTTPException(400, f"{name}: use UTC seconds or an ISO 8601 time such as "
                                     "2026-06-01T00:00Z") from None
        if when.tzinfo is None:
            when = when.replace(tzinfo=UTC)
        value = when.timestamp()
    if not math.isfinite(value) or abs(value) > 1e11:
        raise HTTPException(400, f"{name}: out of range")
    return value


class LivePage:
    """The app's state: where the store is, the site time zone, the figure cache."""

    def __init__(self, store_url: str, captures_dir: str | Path, *, tz_name: str = "UTC",
                 poll_s: float = 10.0, clock: Callable[[], float] = time.time,
                 period_s: float = PERIOD_S, default_nominal_v: float | None = None) -> None:
        self.store_url = store_url
        self.captures_dir = Path(captures_dir)
        self.tz_name = tz_name
        self.tz = pages.zone(tz_name)
        self.poll_s = poll_s
        self.clock = clock
        self.period_s = period_s
        self.default_nominal_v = default_nominal_v
        self.env = pages.environment()
        self._cache: OrderedDict[str, tuple[float, str]] = OrderedDict()
        self._lock = threading.Lock()

    @contextmanager
    def store(self) -> Iterator[RecorderStore]:
        try:
            store = open_read_only(self.store_url, self.captures_dir)
        except StoreError as exc:
            raise HTTPException(503, f"store unavailable: {exc}") from None
        try:
            yield store
        finally:
            store.close()

    # --- figure cache: a page computes its figures once, the <img> requests read them ---

    def remember(self, key: str, fig: Figure) -> None:
        with self._lock:
            self._cache[key] = (self.clock() + _FIGURE_TTL_S, fig.svg)
            self._cache.move_to_end(key)
            while len(self._cache) > _FIGURE_CACHE_SIZE:
                self._cache.popitem(last=False)

    def cached(self, key: str) -> str | None:
        with self._lock:
            hit = self._cache.get(key)
        return hit[1] if hit and hit[0] > self.clock() else None

    # --- the data of each page (the JSON twin; the HTML renders the same dict) ----------

    def fleet_data(self) -> dict[str, Any]:
        now = self.clock()
        with self.store() as store:
            units = [v.as_dict() for v in fleet_now(store, now,
                                                   default_nominal_v=self.default_nominal_v)]
            pages.add_last_events(units, store.events(start_from=now - self.period_s))
        return {"generated_utc": now, "indicative": INDICATIVE, "time_zone": self.tz_name,
                "units": units}

    def unit_data(self, device: str) -> dict[str, Any]:
        now = self.clock()
        start = now - self.period_s
        with self.store() as store:
            try:
                unit = pages.unit_context(store, device)
            except KeyError:
                raise HTTPException(404, f"unit {device!r} is not in the store") from None
            verdict = next((v.as_dict() for v in fleet_now(
                store, now, default_nominal_v=self.default_nominal_v)
                if v.details.get("device") == device), None)
            report = fleet_report(store, now=now, default_nominal_v=self.default_nominal_v,
                                  start_utc=start)
            section: dict[str, Any] = next((d for d in report.get("devices") or []
                                            if d.get("device") == device), {})
            figs = pages.unit_figures(store, unit, self.tz, start, None)
        base = f"/figures/units/{device}/"
        for fig in figs:
            self.remember(base + fig.name, fig)
        events = [pages.event_row(e) for e in unit["events"]
                  if (e.get("start_utc") or 0) >= start]
        captures = [{"capture_id": c, "event_id": e["event_id"],
                     "figure_url": f"/figures/captures/{c}.svg",
                     "comtrade_url": f"/captures/{c}/comtrade.zip"}
                    for e in events for c in e["captures"]]
        section = {k: v for k, v in section.items() if k != "event_list"}
        return {"device": device, "site": unit["site"], "model": unit["model"],
                "nominal_v": unit["nominal_v"], "nominal_hz": unit["nominal_hz"],
                "measurement_point": unit["measurement_point"],
                "bands": [{"rule": b.rule, "low_v": round(b.low_v, 3),
                           "high_v": round(b.high_v, 3), "confidence": b.confidence}
                          for b in unit["bands"]],
                "period": {"start_utc": start, "end_utc": now},
                "indicative": INDICATIVE, "now": verdict, "report": section,
                "figures": [{"name": f.name, "caption": f.caption, "url": base + f.name + ".svg"}
                            for f in figs],
                "events": events, "captures": captures}

    def events_data(self, q: dict[str, str]) -> dict[str, Any]:
        since, until = parse_time(q.get("since"), "since"), parse_time(q.get("until"), "until")
        site = q.get("site") or None
        unit = q.get("unit") or None
        category = (q.get("category") or "").strip().lower() or None
        with self.store() as store:
            rows = [pages.event_row(e) for e in store.events(
                unit, site=site, start_from=since, start_before=until)]
            sites = sorted({d["site"] for d in store.devices()})
            units = sorted(d["device"] for d in store.devices())
        if category:
            rows = [r for r in rows if category in str(r["category"]).lower()
                    or category == str(r["kind"]).lower()]
        rows.sort(key=lambda r: -(r["start_utc"] or 0.0))
        return {"filters": {"site": site, "unit": unit, "category": category,
                            "since_utc": since, "until_utc": until},
                "choices": {"sites": sites, "units": units},
                "count": len(rows), "events": rows}

    # --- HTML -----------------------------------------------------------------------

    def html(self, template: str, title: str, status_code: int = 200,
             **context: Any) -> HTMLResponse:
        body = self.env.get_template(template).render(
            title=title, nav=NAV, asset_base="/static/", tz_name=self.tz_name,
            version=__version__, footer="live page, read-only",
            when=lambda t: pages.when(t, self.tz), invented=None,
            unit_href=lambda d: f"/units/{d}",
            capture_href=lambda c, d: f"/units/{d}#capture-{c}",
            **context)
        return HTMLResponse(body, status_code=status_code)


def create_app(store_url: str, captures_dir: str | Path, *, auth: Auth | None = None,
               **options: Any) -> Any:
    """The ASGI app: security headers on every response; wrapped in :class:`RequireAuth`
    when ``auth`` is given."""
    live = LivePage(store_url, captures_dir, **options)

    def fleet_json(request: Request) -> JSONResponse:
        return JSONResponse(json_safe(live.fleet_data()))

    def fleet_html(request: Request) -> HTMLResponse:
        d = live.fleet_data()
        return live.html("fleet.html", "Units now", data=d, show_indicative=True,
                         rows=pages.fleet_now_rows(d["units"]), poll_ms=int(live.poll_s * 1000),
                         api=f"{API}/fleet")

    def unit_json(request: Request) -> JSONResponse:
        return JSONResponse(json_safe(live.unit_data(request.path_params["device"])))

    def unit_html(request: Request) -> HTMLResponse:
        d = live.unit_data(request.path_params["device"])
        return live.html("unit.html", f"Unit {d['device']}", data=d, show_indicative=True,
                         verdicts=list(pages.verdict_rows({"now": d["now"],
                                                           "report": d["report"]})),
                         api=f"{API}/units/{d['device']}")

    def events_json(request: Request) -> JSONResponse:
        return JSONResponse(json_safe(live.events_data(dict(request.query_params))))

    def events_html(request: Request) -> HTMLResponse:
        d = live.events_data(dict(request.query_params))
        return live.html("events.html", "Event log", data=d, show_indicative=False,
                         request_since=request.query_params.get("since"),
                         request_until=request.query_params.get("until"),
                         api=f"{API}/events?{request.url.query}" if request.url.query
                         else f"{API}/events")

    def unit_figure(request: Request) -> Response:
        device, name = request.path_params["device"], request.path_params["name"]
        if name not in pages.UNIT_FIGURES:
            raise HTTPException(404, f"no figure {name!r}")
        key = f"/figures/units/{device}/{name}"
        svg = live.cached(key)
        if svg is None:
            now = live.clock()
            with live.store() as store:
                try:
                    unit = pages.unit_context(store, device)
                except KeyError:
                    raise HTTPException(404, f"unit {device!r} is not in the store") from None
                (fig,) = pages.unit_figures(store, unit, live.tz, now - live.period_s, None,
                                            only=(name,))
            svg = fig.svg
        return Response(svg, media_type="image/svg+xml")

    def _capture_event(store: RecorderStore, cid: str) -> tuple[dict[str, Any], dict[str, Any]]:
        try:
            info = store.capture_info(cid)
        except StoreError:
            raise HTTPException(404, f"capture {cid!r} is not stored") from None
        unit = pages.unit_context(store, info["device"])
        event: dict[str, Any] = next(
            (e for e in unit["events"] if e["event_id"] == info["event_id"]), {})
        return unit, event

    def capture_figure(request: Request) -> Response:
        cid = request.path_params["capture_id"]
        with live.store() as store:
            unit, event = _capture_event(store, cid)
            try:
                fig = pages.capture_figure(store, unit, event, cid)
            except StoreError as exc:
                raise HTTPException(404, str(exc)) from None
        if fig is None:
            raise HTTPException(404, "the unit's declared voltage or frequency is unknown")
        return Response(fig.svg, media_type="image/svg+xml")

    def capture_comtrade(request: Request) -> Response:
        cid = request.path_params["capture_id"]
        with live.store() as store:
            unit, _ = _capture_event(store, cid)
            if not unit["nominal_hz"]:
                raise HTTPException(404, "the unit's line frequency is unknown")
            try:
                capture = store.capture(cid)
            except StoreError as exc:
                raise HTTPException(404, str(exc)) from None
        buf = io.BytesIO()
        with tempfile.TemporaryDirectory(prefix="hc-comtrade-") as tmp:
            cfg, dat = write_comtrade(capture, tmp, station=str(unit["site"]),
                                      rec_dev_id=str(unit["device"]),
                                      line_hz=float(unit["nominal_hz"]))
            with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as z:
                z.write(cfg, cfg.name)
                z.write(dat, dat.name)
        return Response(buf.getvalue(), media_type="application/zip", headers={
            "content-disposition": f'attachment; filename="{cfg.stem}.zip"'})

    def openapi(request: Request) -> JSONResponse:
        return JSONResponse(openapi_document())

    async def http_error(request: Request, exc: Exception) -> Response:
        assert isinstance(exc, HTTPException)
        if request.url.path.startswith(API) or request.url.path.startswith("/figures") \
                or request.url.path.startswith("/captures"):
            return JSONResponse({"error": exc.detail}, status_code=exc.status_code)
        return live.html("error.html", f"Error {exc.status_code}", status_code=exc.status_code,
                         message=exc.detail, show_indicative=False)

    routes = [
        Route("/", fleet_html), Route(f"{API}/fleet", fleet_json),
        Route("/units/{device}", unit_html), Route(API + "/units/{device}", unit_json),
        Route("/events", events_html), Route(f"{API}/events", events_json),
        Route(f"{API}/openapi.json", openapi),
        Route("/figures/units/{device}/{name}.svg", unit_figure),
        Route("/figures/captures/{capture_id}.svg", capture_figure),
        Route("/captures/{capture_id}/comtrade.zip", capture_comtrade),
        Mount("/static", StaticFiles(directory=pages.STATIC_DIR), name="static"),
    ]
    app = Starlette(routes=routes, exception_handlers={HTTPException: http_error})
    app.state.live = live
    return SecurityHeaders(RequireAuth(app, auth) if auth is not None else app)
