"""The live page's web server: Starlette served by uvicorn on a thread of its own.

Read-only: only GET and HEAD are answered, and nothing on the page reaches the bench. It binds
loopback unless a host is given; on any other address every request needs the token printed
at the terminal (``?token=`` once, then a same-site cookie; or ``Authorization: Bearer``).
Every asset is served from the package (no CDN), so the page works with no internet.

Routes: ``/`` the page, ``/static/*`` its script and style, ``/snapshot.json`` the snapshot
now, ``/events`` the snapshots as server-sent events.
"""

from __future__ import annotations

import asyncio
import hmac
import secrets
import socket
import threading
from collections.abc import AsyncIterator
from pathlib import Path
from urllib.parse import parse_qs

import uvicorn
from starlette.applications import Starlette
from starlette.requests import Request
from starlette.responses import FileResponse, PlainTextResponse, Response, StreamingResponse
from starlette.routing import Mount, Route
from starlette.staticfiles import StaticFiles
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from station.errors import Refused
from station.view.address import ViewAddress
from station.view.hub import SnapshotHub

PAGE_DIR = Path(__file__).with_name("page")
COOKIE = "station_view_token"
KEEPALIVE_S = 15.0        # an SSE comment this often, so proxies and browsers keep the stream
SECURITY_HEADERS = [
    (b"content-security-policy", b"default-src 'self'; img-src 'self' data:; frame-ancestors 'none'"),
    (b"x-content-type-options", b"nosniff"),
    (b"referrer-policy", b"no-referrer"),
    (b"cache-control", b"no-store"),
]


class TokenGate:
    """ASGI middleware: only GET/HEAD; with a token, every request must carry it. Without one
    (loopback), only a loopback Host header is served, so a web page elsewhere cannot read
    the lot through a name that resolves to 127.0.0.1 (DNS rebinding)."""

    def __init__(self, app: ASGIApp, token: str | None, hosts: set[str] | None = None) -> None:
        self.app = app
        self.token = token
        self.hosts = hosts

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        if scope["method"] not in ("GET", "HEAD"):
            await _plain(scope, receive, send, 405, "the live page is read-only", [(b"allow", b"GET, HEAD")])
            return
        set_cookie = False
        if self.token is None and self.hosts is not None and _host_of(scope) not in self.hosts:
            await _plain(scope, receive, send, 421, "this page answers only at its loopback address")
            return
        if self.token is not None:
            given_query = _query_token(scope)
            if given_query is not None and self._good(given_query):
                set_cookie = True
            elif not any(self._good(t) for t in _header_tokens(scope)):
                await _plain(scope, receive, send, 403,
                             "token required: open the address printed at the station's terminal")
                return

        async def send_with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = list(message.get("headers", [])) + SECURITY_HEADERS
                if set_cookie:
                    headers.append((b"set-cookie", f"{COOKIE}={self.token}; Path=/; HttpOnly; "
                                                   "SameSite=Strict".encode()))
                message = {**message, "headers": headers}
            await send(message)

        await self.app(scope, receive, send_with_headers)

    def _good(self, given: str) -> bool:
        assert self.token is not None
        return hmac.compare_digest(given.encode(), self.token.encode())


def _host_of(scope: Scope) -> str:
    """The Host header without its port ('[::1]:8080' -> '::1')."""
    value = next((v.decode("latin-1") for k, v in scope.get("headers", []) if k == b"host"), "")
    if value.startswith("["):
        return value[1:].partition("]")[0].lower()
    return value.rpartition(":")[0].lower() if ":" in value else value.lower()


def _query_token(scope: Scope) -> str | None:
    values = parse_qs(scope.get("query_string", b"").decode("latin-1")).get("token")
    return values[0] if values else None


def _header_tokens(scope: Scope) -> list[str]:
    found = []
    for name, value in scope.get("headers", []):
        text = value.decode("latin-1")
        if name == b"authorization" and text.lower().startswith("bearer "):
            found.append(text[7:].strip())
        elif name == b"cookie":
            for part in text.split(";"):
                key, _, val = part.strip().partition("=")
                if key == COOKIE:
                    found.append(val)
    return found


async def _plain(scope: Scope, receive: Receive, send: Send, status: int, text: str,
                 extra: list[tuple[bytes, bytes]] | None = None) -> None:
    response = PlainTextResponse(text + "\n", status_code=status)
    response.raw_headers.extend(extra or [])
    response.raw_headers.extend(SECURITY_HEADERS)
    await response(scope, receive, send)


def make_app(hub: SnapshotHub, token: str | None = None, hosts: set[str] | None = None) -> ASGIApp:
    async def page(request: Request) -> Response:
        return FileResponse(PAGE_DIR / "index.html", media_type="text/html")

    async def snapshot(request: Request) -> Response:
        return Response(hub.latest, media_type="application/json")

    async def events(request: Request) -> Response:
        queue = hub.subscribe()
        if queue is None:
            return PlainTextResponse("too many open pages; close one and reload\n", status_code=503)
        return StreamingResponse(_stream(hub, queue), media_type="text/event-stream",
                                 headers={"x-accel-buffering": "no"})

    app = Starlette(routes=[
        Route("/", page, methods=["GET"]),
        Route("/snapshot.json", snapshot, methods=["GET"]),
        Route("/events", events, methods=["GET"]),
        Mount("/static", app=StaticFiles(directory=PAGE_DIR), name="static"),
    ])
    return TokenGate(app, token, hosts)


async def _stream(hub: SnapshotHub, queue: asyncio.Queue[str]) -> AsyncIterator[str]:
    try:
        while True:
            try:
                text = await asyncio.wait_for(queue.get(), timeout=KEEPALIVE_S)
            except TimeoutError:
                yield ": keepalive\n\n"
                continue
            yield f"event: snapshot\ndata: {text}\n\n"
    finally:
        hub.unsubscribe(queue)


class PageServer:
    """uvicorn serving the page on a daemon thread; the socket is bound here, in the caller's
    thread, so a port in use is refused at once with one line."""

    def __init__(self, hub: SnapshotHub, address: ViewAddress, token: str | None = None) -> None:
        if not address.loopback and token is None:
            token = new_token()
        self.hub = hub
        self.address = address
        self.token = token
        self.socket = _bind(address)
        self.port = int(self.socket.getsockname()[1])
        hosts = None if token else {"127.0.0.1", "localhost", "::1", address.host.lower()}
        config = uvicorn.Config(make_app(hub, token, hosts), log_level="warning", access_log=False,
                                lifespan="off", timeout_graceful_shutdown=1, limit_concurrency=64)
        self.server = uvicorn.Server(config)
        self._thread = threading.Thread(target=self.server.run, kwargs={"sockets": [self.socket]},
                                        name="live-page-server", daemon=True)

    @property
    def url(self) -> str:
        host = self.address.host
        shown = f"[{host}]" if ":" in host else host
        if host in ("0.0.0.0", "::"):
            shown = socket.gethostname()
        return f"http://{shown}:{self.port}/" + (f"?token={self.token}" if self.token else "")

    def start(self) -> None:
        self.hub.start()
        self._thread.start()

    def stop(self) -> None:
        self.server.should_exit = True
        self._thread.join(timeout=5)
        self.hub.stop()
        self.socket.close()


def new_token() -> str:
    return secrets.token_urlsafe(18)


def _bind(address: ViewAddress) -> socket.socket:
    family = socket.AF_INET6 if ":" in address.host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind((address.host, address.port))
    except OSError as exc:
        sock.close()
        raise Refused(f"--view {address.host}:{address.port}: cannot listen there ({exc.strerror}); "
                      "choose another port") from None
    sock.listen(64)
    sock.setblocking(False)
    return sock
