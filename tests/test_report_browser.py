"""The report as a planner sees it: rendered by headless Chromium.

Two checks: (1) the command-line screenshot decodes, is not blank and the
browser logged no console message (the page has no scripts, so any console
line means a resource failed or the markup is broken); (2) through the
DevTools protocol (a minimal websocket client below, standard library only)
every embedded figure decoded, no error was logged and the page has its
headline. Skipped, with the reason, only when Chromium is missing or will not
start. The report is built from invented fixture frames (see test_report.py).
"""

from __future__ import annotations

import base64
import io
import json
import os
import re
import shutil
import socket
import struct
import subprocess
import tempfile
import time
import urllib.request
from pathlib import Path

import pytest

from test_report import full_inputs
from wearcast.report import build_report

pytestmark = pytest.mark.browser

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--hide-scrollbars"]


def _chromium_or_skip() -> str:
    if not (os.path.isfile(CHROMIUM) and os.access(CHROMIUM, os.X_OK)):
        pytest.skip(f"Chromium not installed at {CHROMIUM} (install the Debian package 'chromium')")
    try:
        probe = subprocess.run([CHROMIUM, "--version"], capture_output=True, text=True, timeout=30)
    except (OSError, subprocess.TimeoutExpired) as exc:
        pytest.skip(f"Chromium at {CHROMIUM} does not start: {exc}")
    if probe.returncode != 0:
        pytest.skip(f"Chromium at {CHROMIUM} does not start: {probe.stderr.strip()[:200]}")
    return CHROMIUM


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("report")
    return build_report(full_inputs(), out)["report"]


def _console_lines(stderr: str) -> list[str]:
    return [line for line in stderr.splitlines() if ":CONSOLE" in line or "net::ERR_" in line]


def test_screenshot_is_not_blank_and_console_is_quiet(report, tmp_path):
    from PIL import Image

    chromium = _chromium_or_skip()
    shot = tmp_path / "report.png"
    profile = tempfile.mkdtemp(prefix="wearcast-chromium-")
    try:
        run = subprocess.run(
            [chromium, *FLAGS, f"--user-data-dir={profile}", "--enable-logging=stderr", "--v=0",
             f"--screenshot={shot}", "--window-size=1280,2000", report.as_uri()],
            capture_output=True, text=True, timeout=120)
    except subprocess.TimeoutExpired:
        pytest.skip("Chromium did not finish a screenshot within 120 s on this machine")
    finally:
        shutil.rmtree(profile, ignore_errors=True)
    if not shot.exists():
        pytest.skip(f"Chromium started but wrote no screenshot: {run.stderr.strip()[-300:]}")
    assert _console_lines(run.stderr) == []
    image = Image.open(io.BytesIO(shot.read_bytes())).convert("RGB")
    assert image.size == (1280, 2000)
    colours = image.getcolors(maxcolors=1 << 20)
    assert colours is not None and len(colours) > 200, "screenshot looks blank or flat"
    most_common = max(colours)[0] / (image.size[0] * image.size[1])
    assert most_common < 0.9, "one colour covers nearly the whole screenshot"
    # the first figures sit in the top 2000 px: the Okabe–Ito blue of their markers must show
    blue = sum(n for n, rgb in colours if abs(rgb[0] - 0x00) < 12 and abs(rgb[1] - 0x72) < 12
               and abs(rgb[2] - 0xB2) < 12)
    assert blue > 2000


# -- a minimal DevTools-protocol client -----------------------------------------------------

class _Socket:
    """Just enough of RFC 6455 for DevTools: masked client text frames, unmasked replies."""

    def __init__(self, url: str, timeout: float = 30.0):
        m = re.match(r"ws://([^/:]+):(\d+)(/.*)", url)
        self.sock = socket.create_connection((m.group(1), int(m.group(2))), timeout=timeout)
        key = base64.b64encode(os.urandom(16)).decode()
        self.sock.sendall((f"GET {m.group(3)} HTTP/1.1\r\nHost: {m.group(1)}:{m.group(2)}\r\n"
                           "Upgrade: websocket\r\nConnection: Upgrade\r\n"
                           f"Sec-WebSocket-Key: {key}\r\nSec-WebSocket-Version: 13\r\n\r\n").encode())
        head = b""
        while b"\r\n\r\n" not in head:
            chunk = self.sock.recv(4096)
            if not chunk:
                raise ConnectionError("DevTools closed the connection during the handshake")
            head += chunk
        if b" 101 " not in head.split(b"\r\n", 1)[0]:
            raise ConnectionError(head.split(b"\r\n", 1)[0].decode(errors="replace"))
        self.buffer = head.split(b"\r\n\r\n", 1)[1]
        self.next_id = 0
        self.events: list[dict] = []

    def _read(self, n: int) -> bytes:
        while len(self.buffer) < n:
            chunk = self.sock.recv(1 << 16)
            if not chunk:
                raise ConnectionError("DevTools closed the connection")
            self.buffer += chunk
        out, self.buffer = self.buffer[:n], self.buffer[n:]
        return out

    def _frame(self) -> tuple[int, bytes]:
        b0, b1 = self._read(2)
        length = b1 & 0x7F
        if length == 126:
            length = struct.unpack(">H", self._read(2))[0]
        elif length == 127:
            length = struct.unpack(">Q", self._read(8))[0]
        mask = self._read(4) if b1 & 0x80 else None
        payload = self._read(length)
        if mask:
            payload = bytes(c ^ mask[i % 4] for i, c in enumerate(payload))
        return b0, payload

    def _message(self) -> dict:
        data = b""
        while True:
            b0, payload = self._frame()
            opcode = b0 & 0x0F
            if opcode in (0x1, 0x0):
                data += payload
                if b0 & 0x80:
                    return json.loads(data)
            elif opcode == 0x8:
                raise ConnectionError("DevTools closed the websocket")
            # pings/pongs ignored: DevTools does not require answers within a test's life

    def call(self, method: str, **params) -> dict:
        self.next_id += 1
        body = json.dumps({"id": self.next_id, "method": method, "params": params}).encode()
        header = bytes([0x81])
        if len(body) < 126:
            header += bytes([0x80 | len(body)])
        elif len(body) < 1 << 16:
            header += bytes([0x80 | 126]) + struct.pack(">H", len(body))
        else:
            header += bytes([0x80 | 127]) + struct.pack(">Q", len(body))
        mask = os.urandom(4)
        self.sock.sendall(header + mask + bytes(c ^ mask[i % 4] for i, c in enumerate(body)))
        while True:
            message = self._message()
            if message.get("id") == self.next_id:
                if "error" in message:
                    raise RuntimeError(f"{method}: {message['error']}")
                return message.get("result", {})
            self.events.append(message)

    def close(self) -> None:
        self.sock.close()


def test_devtools_sees_every_figure_decoded_and_no_errors(report):
    chromium = _chromium_or_skip()
    profile = tempfile.mkdtemp(prefix="wearcast-chromium-")
    proc = subprocess.Popen(
        [chromium, *FLAGS, f"--user-data-dir={profile}", "--remote-debugging-port=0",
         "--remote-debugging-address=127.0.0.1", "--window-size=1280,2000", report.as_uri()],
        stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        port = None
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and port is None:
            line = proc.stderr.readline()
            if not line and proc.poll() is not None:
                break
            m = re.search(r"DevTools listening on ws://[^:]+:(\d+)/", line)
            port = int(m.group(1)) if m else None
        if port is None:
            pytest.skip("Chromium did not open its DevTools port")
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list", timeout=30) as reply:
            targets = json.load(reply)
        pages = [t for t in targets if t.get("type") == "page"]
        page = next((t for t in pages if t.get("url") == report.as_uri()), pages[0])
        ws = _Socket(page["webSocketDebuggerUrl"])
        try:
            ws.call("Log.enable")  # replays entries logged before we attached
            ws.call("Runtime.enable")
            # the tab starts on about:blank; wait until our page itself has loaded
            state, want = "", report.as_uri()
            while state != "complete " + want and time.monotonic() < deadline:
                state = ws.call("Runtime.evaluate", expression="document.readyState + ' ' + location.href",
                                returnByValue=True)["result"]["value"]
                time.sleep(0.1)
            assert state == "complete " + want, f"the report did not load: {state}"
            check = ws.call("Runtime.evaluate", returnByValue=True, awaitPromise=True, expression="""
                Promise.all(Array.from(document.images).map(i => i.decode().then(() => true, () => false)))
                  .then(ok => ({images: document.images.length, decoded: ok.filter(Boolean).length,
                                widths: Array.from(document.images).map(i => i.naturalWidth),
                                cards: document.querySelectorAll('#forecast-cards .card').length,
                                scripts: document.scripts.length,
                                height: document.documentElement.scrollHeight}))""")["result"]["value"]
            ws.call("Runtime.evaluate", expression="1")  # flush pending events
        finally:
            ws.close()
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
        shutil.rmtree(profile, ignore_errors=True)
    assert check["images"] >= 9 and check["decoded"] == check["images"], check
    assert min(check["widths"]) > 100, check
    assert check["cards"] == 3 and check["scripts"] == 0
    problems = [e for e in ws.events
                if (e.get("method") == "Log.entryAdded" and e["params"]["entry"]["level"] in ("error", "warning"))
                or e.get("method") in ("Runtime.exceptionThrown",)
                or (e.get("method") == "Runtime.consoleAPICalled" and e["params"]["type"] in ("error", "warning"))]
    assert problems == []
