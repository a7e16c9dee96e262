"""`calibrate review`: the review page, a small local web server over `ReviewData`.

Starlette on uvicorn, one Jinja2 template and static files shipped in the package
(`calibrate/templates`, `calibrate/static`); Plotly's JavaScript is served from the
plotly package's own file, so the page fetches nothing from the network. Every
request must carry the random access token of the URL printed at start (query
parameter ``token`` or header ``X-Review-Token``); without it the answer is 403.

Endpoints (JSON unless said otherwise; a refused request gets a 4xx and
``{"error": "<one line>"}``, and no file changes)::

    GET    /                              the page (HTML)
    GET    /static/{name}                 review.js, review.css, plotly.min.js
    GET    /api/meta                      hours, levels, metrics, files, progress
    GET    /api/alerts                    the queue, as columns
    GET    /api/alerts/{alert_id}         one alert with its plot data
    POST   /api/alerts/{alert_id}/verdict {"verdict": "real"|"false"|"duplicate"|"", "comment"}
    GET    /api/series-list?level=L       the series of a level
    GET    /api/series?level=L&metric=M&<key column>=<value>...   plot data of any series
    POST   /api/incidents                 {"level", "keys": {...}, "metric", "start", "end", "note"}
    DELETE /api/incidents/{incident_id}   remove an incident this review added
"""

from __future__ import annotations

import json
import secrets
import socket
import threading
import time
import webbrowser
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import jinja2
import uvicorn
from starlette.applications import Starlette
from starlette.requests import Request
from starlette.responses import FileResponse, HTMLResponse, JSONResponse, Response
from starlette.routing import Route

from calibrate.errors import CalibrationError
from calibrate.feedback.review_data import ReviewData, ReviewError, open_review

HERE = Path(__file__).parents[1]  # calibrate/: templates/ and static/
STATIC = {"review.js": "text/javascript", "review.css": "text/css"}
TOKEN_HEADER = "x-review-token"
MAX_BODY = 64 * 1024
HEADERS = {
    # nothing but this server's own files: no inline script, nothing from the network
    "Content-Security-Policy": "default-src 'self'; script-src 'self'; "
                               "style-src 'self' 'unsafe-inline'; img-src 'self' data:; "
                               "connect-src 'self'; frame-ancestors 'none'",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-store",
}


def plotly_js() -> Path:
    """The plotly package's bundled `plotly.min.js`."""
    import plotly

    path = Path(plotly.__file__).parent / "package_data" / "plotly.min.js"
    if not path.is_file():
        raise CalibrationError(f"{path}: missing; reinstall the plotly package")
    return path


def _error(status: int, reason: str) -> JSONResponse:
    return JSONResponse({"error": reason}, status_code=status, headers=HEADERS)


def _json(data: Any) -> Response:
    return Response(json.dumps(data, allow_nan=False, separators=(",", ":")),
                    media_type="application/json", headers=HEADERS)


class TokenGuard:
    """ASGI middleware: 403 for any HTTP request without the access token."""

    def __init__(self, app: Any, token: str):
        self.app = app
        self.token = token

    async def __call__(self, scope: dict, receive: Callable, send: Callable) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        request = Request(scope)
        given = request.headers.get(TOKEN_HEADER) or request.query_params.get("token") or ""
        if not secrets.compare_digest(given.encode(), self.token.encode()):
            await _error(403, "missing or wrong access token: open the URL "
                         "`calibrate review` printed")(scope, receive, send)
            return
        await self.app(scope, receive, send)


async def _body(request: Request) -> Any:
    raw = await request.body()
    if len(raw) > MAX_BODY:
        raise ReviewError(413, f"request body larger than {MAX_BODY} bytes")
    try:
        return json.loads(raw or b"null")
    except (ValueError, UnicodeDecodeError):
        raise ReviewError(400, "request body is not JSON") from None


def make_app(data: ReviewData, token: str) -> Any:
    """The review page's ASGI app over `data`, guarded by `token`."""
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(HERE / "templates"),
                             autoescape=True, undefined=jinja2.StrictUndefined)
    page = env.get_template("review.html")
    plotly_path = plotly_js()

    def guarded(fn: Callable) -> Callable:
        async def endpoint(request: Request) -> Response:
            try:
                return await fn(request)
            except ReviewError as exc:
                return _error(exc.status, exc.reason)
            except CalibrationError as exc:
                return _error(400, " ".join(str(exc).split()))
        return endpoint

    async def index(request: Request) -> Response:
        html = page.render(token=token, workspace=data.ses.ws.root.name,
                           config=data.config_name)
        return HTMLResponse(html, headers=HEADERS)

    async def static(request: Request) -> Response:
        name = request.path_params["name"]
        if name == "plotly.min.js":
            return FileResponse(plotly_path, media_type="text/javascript",
                                headers={**HEADERS, "Cache-Control": "private, max-age=86400"})
        if name not in STATIC:
            raise ReviewError(404, f"no static file '{name}'")
        return FileResponse(HERE / "static" / name, media_type=STATIC[name], headers=HEADERS)

    async def meta(request: Request) -> Response:
        return _json(data.meta())

    async def queue(request: Request) -> Response:
        return _json(data.queue())

    async def alert(request: Request) -> Response:
        return _json(data.alert(request.path_params["alert_id"]))

    async def verdict(request: Request) -> Response:
        body = await _body(request)
        if not isinstance(body, dict) or "verdict" not in body:
            raise ReviewError(400, 'give {"verdict": "real" | "false" | "duplicate" | "", '
                              '"comment": "..."}')
        return _json(data.set_verdict(request.path_params["alert_id"], body["verdict"],
                                      body.get("comment", "")))

    async def series_list(request: Request) -> Response:
        return _json(data.series_list(request.query_params.get("level", "")))

    async def series(request: Request) -> Response:
        q = request.query_params
        level, metric = q.get("level", ""), q.get("metric", "")
        s = data.find_series(level, dict(q))
        return _json(data.series(level, s, metric))

    async def add_incident(request: Request) -> Response:
        return _json(data.add_incident(await _body(request)))

    async def delete_incident(request: Request) -> Response:
        return _json(data.delete_incident(request.path_params["incident_id"]))

    routes = [
        Route("/", guarded(index)),
        Route("/static/{name}", guarded(static)),
        Route("/api/meta", guarded(meta)),
        Route("/api/alerts", guarded(queue)),
        Route("/api/alerts/{alert_id}", guarded(alert)),
        Route("/api/alerts/{alert_id}/verdict", guarded(verdict), methods=["POST"]),
        Route("/api/series-list", guarded(series_list)),
        Route("/api/series", guarded(series)),
        Route("/api/incidents", guarded(add_incident), methods=["POST"]),
        Route("/api/incidents/{incident_id}", guarded(delete_incident), methods=["DELETE"]),
    ]
    return TokenGuard(Starlette(routes=routes), token)


def bind(host: str, port: int) -> socket.socket:
    """A listening socket on `host`:`port` (0: a free port)."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind((host, port))
    except OSError as exc:
        sock.close()
        raise CalibrationError(f"--port {port}: cannot listen on {host}:{port} "
                               f"({exc.strerror or exc})") from None
    sock.listen(128)
    return sock


def url_of(sock: socket.socket, token: str) -> str:
    host, port = sock.getsockname()[:2]
    host = f"[{host}]" if ":" in host else host
    return f"http://{host}:{port}/?token={token}"


def _server(app: Any) -> uvicorn.Server:
    return uvicorn.Server(uvicorn.Config(app, log_level="warning", access_log=False,
                                         lifespan="off", timeout_graceful_shutdown=2))


@contextmanager
def running(data: ReviewData, host: str = "127.0.0.1", port: int = 0,
            start_timeout: float = 10.0) -> Iterator[str]:
    """Serve `data` from a background thread; yields the page's URL and always shuts
    the server down on the way out (used by tests and the benchmark)."""
    token = secrets.token_urlsafe(24)
    sock = bind(host, port)
    server = _server(make_app(data, token))
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    try:
        deadline = time.monotonic() + start_timeout
        while not server.started:
            if not thread.is_alive() or time.monotonic() > deadline:
                raise RuntimeError("the review server did not start")
            time.sleep(0.02)
        yield url_of(sock, token)
    finally:
        server.should_exit = True
        thread.join(timeout=10)
        sock.close()


def serve(data: ReviewData, host: str = "127.0.0.1", port: int = 0,
          open_browser: bool = True, say: Callable[[str], None] = print) -> None:
    """Serve the review page until interrupted (Ctrl-C)."""
    token = secrets.token_urlsafe(24)
    sock = bind(host, port)
    url = url_of(sock, token)
    if host not in ("127.0.0.1", "localhost", "::1"):
        say(f"warning: listening on {host}: anyone who can reach it and has the URL can "
            "change the verdicts file")
    say("review page (keep this running; Ctrl-C stops it):")
    say(url)
    if open_browser:
        webbrowser.open(url)
    try:
        _server(make_app(data, token)).run(sockets=[sock])
    finally:
        sock.close()
        p = data.progress()
        say(f"{p['reviewed']} of {p['total']} alerts reviewed; verdicts in "
            f"{data.paths.verdicts}")


def review(
    workspace: str | Path,
    *,
    verdicts: str | Path,
    config: str | Path | None = None,
    alerts: str | Path | None = None,
    incidents_out: str | Path | None = None,
    host: str = "127.0.0.1",
    port: int = 0,
    open_browser: bool = True,
    engine: str = "local",
    workers: int | None = None,
    scheduler: str | None = None,
    say: Callable[[str], None] = print,
) -> ReviewData:
    """`calibrate review`: replay, read back earlier verdicts and incidents, serve the page.

    Returns the review's data after the server stops.
    """
    if not 0 <= port <= 65535:
        raise CalibrationError(f"--port {port}: not a port number (0-65535; 0 picks a free one)")
    say(f"replaying {config or 'the workspace [detector]'} for the plots and alerts")
    data = open_review(workspace, verdicts=verdicts, config=config, alerts=alerts,
                       incidents_out=incidents_out, engine=engine, workers=workers,
                       scheduler=scheduler)
    p = data.progress()
    say(f"{p['total']} alerts to review, {p['reviewed']} already reviewed in {verdicts}")
    serve(data, host, port, open_browser, say)
    return data
