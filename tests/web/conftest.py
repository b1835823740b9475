"""A real server on 127.0.0.1 and the system's headless Chromium driven by Playwright.

Playwright's own browser download is not used: the tests drive the Chromium of the system's
packages (``/usr/bin/chromium``; ``.ci/run`` installs it when missing).  Without a browser, or
without the ``playwright`` package, the browser tests skip and say why.
"""

from __future__ import annotations

import os
import shutil
import socket
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import httpx
import pytest
import uvicorn

from service.api import Settings, create_app

#: Flags for a quiet headless browser: no GPU, no sandbox (CI runs as root), no calls home.
CHROMIUM_FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]
KEY = "workbench-test-key-0123456789"


def chromium_path() -> str | None:
    """The system's Chromium: ``MOVECAST_CHROMIUM``, /usr/bin/chromium, or one on PATH."""
    for candidate in (os.environ.get("MOVECAST_CHROMIUM"), "/usr/bin/chromium", shutil.which("chromium")):
        if candidate and Path(candidate).is_file():
            return candidate
    return None


@dataclass
class Server:
    """A running movecast server: its base URL (the page's address, prefix included)."""

    base: str
    origin: str

    def post(self, path: str, body: Any, *, key: str | None = None) -> httpx.Response:
        headers = {"Authorization": f"Bearer {key}"} if key else {}
        return httpx.post(f"{self.base}{path}", json=body, headers=headers, timeout=60)


@pytest.fixture(scope="session")
def start_server() -> Iterator[Callable[..., Server]]:
    """Start servers on free loopback ports; each stops when the session ends."""
    running: list[tuple[uvicorn.Server, threading.Thread]] = []

    def start(*, root_path: str = "", **settings: Any) -> Server:
        sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
        config = uvicorn.Config(
            create_app(Settings(**settings)), log_level="warning", root_path=root_path, lifespan="on"
        )
        server = uvicorn.Server(config)
        thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
        thread.start()
        origin = f"http://127.0.0.1:{port}"
        deadline = time.monotonic() + 30
        while not server.started:
            if time.monotonic() > deadline or not thread.is_alive():
                raise RuntimeError("the test server did not start")
            time.sleep(0.05)
        running.append((server, thread))
        return Server(base=f"{origin}{root_path}", origin=origin)

    yield start
    for server, thread in running:
        server.should_exit = True
        thread.join(timeout=30)


#: Request headers a reverse proxy passes on (the rest, hop-by-hop or encoding, it drops).
_PASSED = ("authorization", "content-type", "accept")


@pytest.fixture(scope="session")
def start_prefix_proxy() -> Iterator[Callable[[Server, str], Server]]:
    """A minimal reverse proxy on 127.0.0.1 that serves ``server`` under a path ``prefix``:
    it strips the prefix and forwards the rest, as a proxy in front of the service would."""
    running: list[ThreadingHTTPServer] = []

    def start(server: Server, prefix: str) -> Server:
        class Forward(BaseHTTPRequestHandler):
            def _forward(self) -> None:
                if not self.path.startswith(prefix + "/"):
                    self.send_error(404)
                    return
                length = int(self.headers.get("content-length") or 0)
                body = self.rfile.read(length) if length else None
                headers = {k: v for k, v in self.headers.items() if k.lower() in _PASSED}
                answer = httpx.request(
                    self.command,
                    f"{server.origin}{self.path[len(prefix) :]}",
                    headers=headers,
                    content=body,
                    timeout=60,
                )
                self.send_response(answer.status_code)
                for name in ("content-type", "www-authenticate"):
                    if name in answer.headers:
                        self.send_header(name, answer.headers[name])
                self.send_header("content-length", str(len(answer.content)))
                self.end_headers()
                self.wfile.write(answer.content)

            do_GET = _forward
            do_POST = _forward

            def log_message(self, format: str, *args: Any) -> None:
                pass

        proxy = ThreadingHTTPServer(("127.0.0.1", 0), Forward)
        proxy.daemon_threads = True
        threading.Thread(target=proxy.serve_forever, daemon=True).start()
        running.append(proxy)
        origin = f"http://127.0.0.1:{proxy.server_address[1]}"
        return Server(base=f"{origin}{prefix}", origin=origin)

    yield start
    for proxy in running:
        proxy.shutdown()
        proxy.server_close()


@pytest.fixture(scope="session")
def browser() -> Iterator[Any]:
    """The system's headless Chromium, or a skip saying what is missing."""
    executable = chromium_path()
    if executable is None:
        pytest.skip("browser tests need the system's Chromium (/usr/bin/chromium; apt-get install chromium)")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        pytest.skip("browser tests need the 'playwright' package (pip install '.[test]')")
    with sync_playwright() as playwright:
        launched = playwright.chromium.launch(executable_path=executable, args=CHROMIUM_FLAGS, headless=True)
        try:
            yield launched
        finally:
            launched.close()


@pytest.fixture
def page(browser: Any) -> Iterator[Any]:
    """A fresh browser context and page (downloads accepted, a desktop-sized window)."""
    context = browser.new_context(accept_downloads=True, viewport={"width": 1280, "height": 900})
    opened = context.new_page()
    try:
        yield opened
    finally:
        context.close()
