"""The live page's server: read-only, loopback by default, a token on every request when it
listens elsewhere, and pages that read slowly or never cost the lot nothing."""

from __future__ import annotations

import http.client
import re
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from station.errors import Refused
from station.view.address import parse_address
from station.view.hub import SnapshotHub
from station.view.server import COOKIE, PageServer, ViewAddress
from station.view.snapshot import LotSnapshots
from tests.support.review_datalogs import LotSpec, make_datalog

ROUTES = ("/", "/static/view.js", "/static/view.css", "/snapshot.json", "/events", "/no-such-page")


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return make_datalog(tmp_path_factory.mktemp("view") / "lot", LotSpec(parts=40))


@pytest.fixture
def serve(folder: Path) -> Iterator:
    servers: list[PageServer] = []

    def start(host: str = "127.0.0.1") -> PageServer:
        server = PageServer(SnapshotHub(LotSnapshots(folder), poll_s=0.05), ViewAddress(host, 0))
        server.start()
        servers.append(server)
        _wait_listening(server.port)
        return server

    yield start
    for server in servers:
        server.stop()


def _wait_listening(port: int) -> None:
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline:
        try:
            socket.create_connection(("127.0.0.1", port), timeout=1).close()
            return
        except OSError:
            time.sleep(0.05)
    raise TimeoutError(f"nothing listens on {port}")


def _rss_bytes() -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
    pytest.skip("no /proc/self/status on this system (memory bound not checked)")
    return 0


def request(port: int, path: str, method: str = "GET", headers: dict[str, str] | None = None,
            read: bool = True) -> tuple[int, dict[str, str], bytes]:
    connection = http.client.HTTPConnection("127.0.0.1", port, timeout=10)
    connection.request(method, path, headers=headers or {})
    response = connection.getresponse()
    body = response.read() if read and path != "/events" else response.read1(4096) if read else b""
    result = response.status, {k.lower(): v for k, v in response.getheaders()}, body
    connection.close()
    return result


def test_loopback_serves_the_page_its_assets_and_events(serve) -> None:
    server = serve()
    assert server.token is None and server.url == f"http://127.0.0.1:{server.port}/"
    status, headers, body = request(server.port, "/")
    assert status == 200 and b"static/view.js" in body
    assert "default-src 'self'" in headers["content-security-policy"]
    # Every asset is the station's own: nothing on the page points elsewhere (no CDN).
    assert not re.search(rb'(src|href)="(https?:)?//', body)
    for asset in ("/static/view.js", "/static/view.css"):
        status, _, text = request(server.port, asset)
        assert status == 200 and b"http" not in text
    status, headers, chunk = request(server.port, "/events")
    assert status == 200 and headers["content-type"].startswith("text/event-stream")
    assert chunk.startswith(b"event: snapshot\ndata: {")


def test_the_page_controls_nothing(serve) -> None:
    server = serve()
    for method in ("POST", "PUT", "DELETE", "PATCH"):
        for path in ("/", "/events", "/snapshot.json", "/pause", "/continue"):
            status, headers, _ = request(server.port, path, method)
            assert status == 405 and headers["allow"] == "GET, HEAD"


def test_loopback_answers_only_at_a_loopback_name(serve) -> None:
    server = serve()
    assert request(server.port, "/", headers={"Host": f"localhost:{server.port}"})[0] == 200
    # A name of someone else's site that resolves to 127.0.0.1 (DNS rebinding) gets nothing.
    status, _, body = request(server.port, "/snapshot.json", headers={"Host": f"evil.example:{server.port}"})
    assert status == 421 and b"lot_id" not in body


def test_elsewhere_every_request_needs_the_token(serve) -> None:
    server = serve("0.0.0.0")        # every address; the test only connects over loopback
    token = server.token
    assert token and len(token) >= 20 and f"?token={token}" in server.url
    for path in ROUTES:
        for headers in ({}, {"Authorization": "Bearer wrong"}, {"Cookie": f"{COOKIE}=wrong"}):
            status, _, body = request(server.port, path, headers=headers)
            assert status == 403, (path, headers)
            assert b"lot_id" not in body and b"LOT-T1" not in body
        status, _, _ = request(server.port, path + ("&" if "?" in path else "?") + "token=wrong")
        assert status == 403
    status, headers, body = request(server.port, f"/?token={token}")
    assert status == 200 and b"static/view.js" in body
    cookie = headers["set-cookie"]
    assert cookie.startswith(f"{COOKIE}={token};") and "HttpOnly" in cookie and "SameSite=Strict" in cookie
    # The browser then sends the cookie with the assets and the event stream.
    for path in ("/static/view.js", "/snapshot.json", "/events"):
        assert request(server.port, path, headers={"Cookie": f"{COOKIE}={token}"})[0] == 200
    status, _, body = request(server.port, "/snapshot.json", headers={"Authorization": f"Bearer {token}"})
    assert status == 200 and b"LOT-T1" in body
    # With the token, still nothing but reading.
    assert request(server.port, f"/?token={token}", "POST")[0] == 405


def test_station_view_prints_the_token_and_refuses_without_it(folder: Path) -> None:
    process = subprocess.Popen([sys.executable, "-m", "station.cli.main", "view", str(folder), "--host", "0.0.0.0",
                                "--port", "0"], stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    try:
        assert process.stdout is not None
        line = process.stdout.readline()
        match = re.search(r"live page: http://[^:/]+:(\d+)/\?token=(\S+)", line)
        assert match, line
        port, token = int(match[1]), match[2]
        assert "token" in process.stdout.readline()
        _wait_listening(port)
        assert request(port, "/")[0] == 403
        assert request(port, "/snapshot.json")[0] == 403
        assert request(port, f"/snapshot.json?token={token}")[0] == 200
    finally:
        process.send_signal(signal.SIGINT)
        process.wait(timeout=20)
    assert process.returncode == 0


def test_view_addresses() -> None:
    assert parse_address("8080") == ViewAddress("127.0.0.1", 8080)
    assert parse_address("0.0.0.0:9000") == ViewAddress("0.0.0.0", 9000)
    assert parse_address("[::1]:9000") == ViewAddress("::1", 9000)
    assert parse_address("localhost:1").loopback and parse_address("[::1]:1").loopback
    assert not parse_address("0.0.0.0:1").loopback and not parse_address("station-7:1").loopback
    for bad in ("", "x", "99999", "::1:80", "host:", ":80x"):
        with pytest.raises(Refused, match="give PORT or HOST:PORT"):
            parse_address(bad)


def test_a_port_in_use_is_refused_in_one_line(folder: Path) -> None:
    taken = socket.socket()
    taken.bind(("127.0.0.1", 0))
    taken.listen(1)
    try:
        with pytest.raises(Refused, match=r"cannot listen there .*choose another port"):
            PageServer(SnapshotHub(LotSnapshots(folder)), ViewAddress("127.0.0.1", taken.getsockname()[1]))
    finally:
        taken.close()


def test_a_page_that_never_reads_holds_one_snapshot_and_a_gone_page_nothing(serve) -> None:
    server = serve()
    hub = server.hub
    stuck = socket.socket()
    stuck.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)
    stuck.connect(("127.0.0.1", server.port))
    stuck.sendall(f"GET /events HTTP/1.1\r\nHost: 127.0.0.1:{server.port}\r\n\r\n".encode())
    gone = socket.create_connection(("127.0.0.1", server.port))
    gone.sendall(f"GET /events HTTP/1.1\r\nHost: 127.0.0.1:{server.port}\r\n\r\n".encode())
    deadline = time.monotonic() + 10
    while hub.pages < 2 and time.monotonic() < deadline:
        time.sleep(0.02)
    assert hub.pages == 2
    gone.close()
    # 40 MB of snapshots for a page that never reads, far beyond what the sockets buffer: the
    # hub never waits, and that page's queue holds one snapshot at most.
    big = hub.latest[:-1] + ',"padding":"' + "x" * 200_000 + '"}'
    before = _rss_bytes()
    start = time.monotonic()
    for n in range(200):
        hub.publish(big[:-2] + f'{n}"}}')        # a new string each time, as the hub makes
        time.sleep(0.001)
    assert time.monotonic() - start < 10
    time.sleep(0.3)
    assert _rss_bytes() - before < 15e6       # 40 MB offered
    time.sleep(0.3)
    queues = list(hub._pages)
    assert len(queues) == 1 and all(q.qsize() <= 1 for q in queues)
    # The page that went away was let go.
    assert hub.pages == 1
    ok = request(server.port, "/snapshot.json")
    assert ok[0] == 200                       # the server still answers everyone else
    stuck.close()


def test_a_dry_run_on_another_address_prints_its_token_and_refuses_without_it(tmp_path: Path) -> None:
    process = subprocess.Popen([sys.executable, "-m", "station.cli.main", "dry-run", "--parts", "8", "--out",
                                str(tmp_path / "lot"), "--view", "0.0.0.0:0"],
                               stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    try:
        assert process.stdout is not None
        lines = [process.stdout.readline() for _ in range(3)]
        match = re.search(r"live page: http://[^:/]+:(\d+)/\?token=(\S+)", "".join(lines))
        assert match, lines
        port, token = int(match[1]), match[2]
        # While the lot runs: nothing without the token, the snapshot with it.
        assert request(port, "/")[0] == 403
        assert request(port, "/events")[0] == 403
        status, _, body = request(port, "/snapshot.json", headers={"Authorization": f"Bearer {token}"})
        assert status == 200 and b'"state"' in body
        output, _ = process.communicate(timeout=120)
    finally:
        if process.poll() is None:
            process.kill()
            process.wait()
    assert process.returncode == 0, output
    assert token not in (tmp_path / "lot" / "lot.json").read_text()     # never written to a file


def test_a_bad_view_option_is_refused_before_anything_starts(tmp_path: Path) -> None:
    result = subprocess.run([sys.executable, "-m", "station.cli.main", "dry-run", "--out", str(tmp_path / "lot"),
                             "--view", "nowhere"], capture_output=True, text=True, timeout=60)
    assert result.returncode == 2
    assert "give PORT or HOST:PORT" in result.stderr
    assert not (tmp_path / "lot").exists()
