"""The live page's web server: Starlette served by uvicorn on a thread of its own.

GET and HEAD only, except one POST: ``/answer``, the answer to a lot-control pause, which a
lot's server (one with a PauseDesk) takes only with its bench-control token in the
``X-Control-Token`` header (none: 401, wrong: 403; nothing changes). That token is made per
process and printed at the terminal in the page's fragment (``#control=``), so it never
reaches a server log or a referrer; a page opened without it only watches. A custom header
also means no other site's form or script can send the answer (it would need a CORS
preflight, which is not answered). It binds loopback unless a host is given; on any other
address every request needs the view token printed at the terminal too (``?token=`` once,
then a same-site cookie; or ``Authorization: Bearer``). Every asset is served from the
package (no CDN), so the page works with no internet.

Routes: ``/`` the page, ``/static/*`` its script and style, ``/snapshot.json`` the snapshot
now, ``/events`` the snapshots as server-sent events, ``/answer`` (POST, JSON
``{"pause": id, "choice": "continue" | "skip" | "stop"}``).
"""

from __future__ import annotations

import asyncio
import hmac
import json
import secrets
import socket
import threading
from collections.abc import AsyncIterator
from pathlib import Path
from urllib.parse import parse_qs

import uvicorn
from starlette.applications import Starlette
from starlette.requests import Request
from starlette.responses import (
    FileResponse,
    JSONResponse,
    PlainTextResponse,
    Response,
    StreamingResponse,
)
from starlette.routing import Mount, Route
from starlette.staticfiles import StaticFiles
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from station.errors import Refused
from station.screen.pause_desk import PauseDesk
from station.view.address import ViewAddress
from station.view.hub import SnapshotHub

PAGE_DIR = Path(__file__).with_name("page")
COOKIE = "station_view_token"
CONTROL_HEADER = "x-control-token"
ANSWER_PATH = "/answer"
MAX_ANSWER_BYTES = 1024
KEEPALIVE_S = 15.0        # an SSE comment this often, so proxies and browsers keep the stream
SECURITY_HEADERS = [
    (b"content-security-policy", b"default-src 'self'; img-src 'self' data:; frame-ancestors 'none'"),
    (b"x-content-type-options", b"nosniff"),
    (b"referrer-policy", b"no-referrer"),
    (b"cache-control", b"no-store"),
]


class TokenGate:
    """ASGI middleware: only GET/HEAD (and POST to /answer, which checks its own token); with a
    token, every request must carry it. Without one
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
        post_answer = scope["method"] == "POST" and scope["path"] == ANSWER_PATH
        if scope["method"] not in ("GET", "HEAD") and not post_answer:
            await _plain(scope, receive, send, 405, "the live page is read-only (only a pause is answered, "
                         f"by POST {ANSWER_PATH})", [(b"allow", b"GET, HEAD")])
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


def make_app(hub: SnapshotHub, token: str | None = None, hosts: set[str] | None = None,
             desk: PauseDesk | None = None, control_token: str | None = None) -> ASGIApp:
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

    async def answer(request: Request) -> Response:
        if desk is None or control_token is None:
            return _answer_reply(404, "this page cannot answer a pause (it is served from the datalog "
                                 "folder, not by the lot): answer at the station's terminal")
        given = request.headers.get(CONTROL_HEADER)
        if not given:
            return _answer_reply(401, "the bench-control token is missing: open the live page from the "
                                 "control address printed at the station's terminal")
        if not hmac.compare_digest(given.encode(), control_token.encode()):
            return _answer_reply(403, "wrong bench-control token: open the live page from the control "
                                 "address printed at the station's terminal")
        body = await request.body()
        try:
            data = json.loads(body) if len(body) <= MAX_ANSWER_BYTES else None
        except ValueError:
            data = None
        if not isinstance(data, dict) or not isinstance(data.get("pause"), str | int) \
                or not isinstance(data.get("choice"), str):
            return _answer_reply(400, 'send JSON {"pause": id, "choice": "continue" | "skip" | "stop"}')
        reply = desk.answer(str(data["pause"]), data["choice"], "page")
        if reply.accepted:
            hub.poke()
        return _answer_reply(reply.status, reply.message, reply.accepted, reply.answered or reply.accepted)

    app = Starlette(routes=[
        Route("/", page, methods=["GET"]),
        Route("/snapshot.json", snapshot, methods=["GET"]),
        Route("/events", events, methods=["GET"]),
        Route(ANSWER_PATH, answer, methods=["POST"]),
        Mount("/static", app=StaticFiles(directory=PAGE_DIR), name="static"),
    ])
    return TokenGate(app, token, hosts)


def _answer_reply(status: int, message: str, accepted: bool = False, answered: bool = False) -> Response:
    return JSONResponse({"accepted": accepted, "answered": answered, "message": message}, status_code=status)


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

    def __init__(self, hub: SnapshotHub, address: ViewAddress, token: str | None = None,
                 desk: PauseDesk | None = None, control_token: str | None = None) -> None:
        if not address.loopback and token is None:
            token = new_token()
        if desk is not None and control_token is None:
            control_token = new_token()
        self.hub = hub
        self.address = address
        self.token = token
        self.control_token = control_token if desk is not None else None
        self.socket = _bind(address)
        self.port = int(self.socket.getsockname()[1])
        hosts = None if token else {"127.0.0.1", "localhost", "::1", address.host.lower()}
        config = uvicorn.Config(make_app(hub, token, hosts, desk, self.control_token), log_level="warning", access_log=False,
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

    @property
    def control_url(self) -> str | None:
        """The page's address with the bench-control token in its fragment (never sent to a server)."""
        return None if self.control_token is None else f"{self.url}#control={self.control_token}"

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
