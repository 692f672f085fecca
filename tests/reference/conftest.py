"""Runs the real service binary once per test session on a free loopback port.

``ODDSMITH_BIN`` overrides the binary path (default ``<repo>/target/debug/oddsmith``);
``ODDSMITH_URL`` points the suite at a server that is already running instead.
Only the standard library talks HTTP, over one kept-alive connection.

Run from the repository root:
    python3 -m pip install -r tests/reference/requirements.txt
    cargo build -p oddsmith && python3 -m pytest tests/reference -q
"""

from __future__ import annotations

import http.client
import json
import os
import socket
import subprocess
import tempfile
import time
import urllib.parse
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
HEALTH_TIMEOUT_S = 60.0


class Service:
    """A minimal JSON client that reuses one HTTP/1.1 connection."""

    def __init__(self, base_url: str):
        self.base_url = base_url
        parts = urllib.parse.urlsplit(base_url)
        self._host, self._port = parts.hostname, parts.port or 80
        self._conn: http.client.HTTPConnection | None = None

    def _request(self, method: str, path: str, body: bytes | None, headers: dict):
        for attempt in (1, 2):  # one retry if the kept-alive connection was closed
            if self._conn is None:
                self._conn = http.client.HTTPConnection(self._host, self._port, timeout=60)
            try:
                self._conn.request(method, path, body=body, headers=headers)
                resp = self._conn.getresponse()
                return resp.status, resp.read(), resp.getheader("Content-Type", "")
            except (http.client.HTTPException, ConnectionError, OSError):
                self._conn.close()
                self._conn = None
                if attempt == 2:
                    raise

    def get(self, path: str):
        return self._request("GET", path, None, {})

    def post_text(self, path: str, text: str):
        """POST a JSON body given as text; return (status, parsed JSON or raw text)."""
        status, body, _ = self.post_text_typed(path, text)
        return status, body

    def post_text_typed(self, path: str, text: str):
        """As :meth:`post_text`, also returning the response's Content-Type."""
        status, raw, ctype = self._request(
            "POST", path, text.encode("utf-8"), {"Content-Type": "application/json"}
        )
        try:
            return status, json.loads(raw), ctype
        except ValueError:
            return status, raw.decode("utf-8", "replace"), ctype

    def solve(self, text: str) -> dict:
        """POST /v1/solve and insist on 200, showing the problem document otherwise."""
        status, body = self.post_text("/v1/solve", text)
        assert status == 200, f"HTTP {status}: {body}\nrequest: {text}"
        return body

    def close(self):
        if self._conn is not None:
            self._conn.close()


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_healthy(base: str, proc: subprocess.Popen | None, log_path: str | None) -> None:
    deadline = time.monotonic() + HEALTH_TIMEOUT_S
    probe = Service(base)
    last = None
    while time.monotonic() < deadline:
        if proc is not None and proc.poll() is not None:
            log = Path(log_path).read_text(errors="replace") if log_path else ""
            pytest.fail(f"service exited with {proc.returncode} before /healthz answered:\n{log}")
        try:
            status, _, _ = probe.get("/healthz")
            if status == 200:
                probe.close()
                return
            last = f"HTTP {status}"
        except OSError as exc:
            last = repr(exc)
        time.sleep(0.1)
    probe.close()
    pytest.fail(f"/healthz did not answer 200 within {HEALTH_TIMEOUT_S} s (last: {last})")


@pytest.fixture(scope="session")
def base_url():
    """Base URL of a running service; started here unless ODDSMITH_URL is set."""
    external = os.environ.get("ODDSMITH_URL")
    if external:
        _wait_healthy(external.rstrip("/"), None, None)
        yield external.rstrip("/")
        return

    binary = Path(os.environ.get("ODDSMITH_BIN", REPO / "target" / "debug" / "oddsmith"))
    if not binary.exists():
        pytest.fail(f"service binary not found at {binary}; build it with `cargo build -p oddsmith`")
    port = _free_port()
    base = f"http://127.0.0.1:{port}"
    log = tempfile.NamedTemporaryFile(prefix="oddsmith-ref-", suffix=".log", delete=False)
    proc = subprocess.Popen(
        [str(binary), "--bind", f"127.0.0.1:{port}"],
        stdin=subprocess.DEVNULL,
        stdout=log,
        stderr=subprocess.STDOUT,
    )
    try:
        _wait_healthy(base, proc, log.name)
        yield base
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        log.close()
        os.unlink(log.name)


@pytest.fixture(scope="session")
def service(base_url):
    """One shared client (one kept-alive connection) for the whole session."""
    client = Service(base_url)
    yield client
    client.close()
