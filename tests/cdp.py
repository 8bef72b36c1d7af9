"""A tiny Chrome DevTools Protocol client over a stdlib websocket, for the report's browser test.

Only what the test needs: start headless Chromium with a fresh profile and no background
networking, open a page, collect console errors, uncaught exceptions, log errors and network
requests, evaluate JavaScript, take a full-page screenshot. The websocket framing follows
RFC 6455 (client frames masked; text, continuation, ping and close frames handled).
"""
from __future__ import annotations

import base64
import json
import os
import re
import select
import socket
import struct
import subprocess
import time
from pathlib import Path
from urllib.parse import urlparse

CHROMIUM_FLAGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--disable-default-apps", "--disable-extensions", "--hide-scrollbars", "--mute-audio",
]


class _WebSocket:
    """Just enough of RFC 6455 for a local DevTools socket: masked text frames out, frames in."""

    def __init__(self, url: str, timeout: float = 30.0):
        u = urlparse(url)
        self.sock = socket.create_connection((u.hostname, u.port), timeout=timeout)
        key = base64.b64encode(os.urandom(16)).decode()
        req = (f"GET {u.path} HTTP/1.1\r\nHost: {u.hostname}:{u.port}\r\nUpgrade: websocket\r\n"
               f"Connection: Upgrade\r\nSec-WebSocket-Key: {key}\r\nSec-WebSocket-Version: 13\r\n\r\n")
        self.sock.sendall(req.encode())
        head = b""
        while b"\r\n\r\n" not in head:
            chunk = self.sock.recv(4096)
            if not chunk:
                raise ConnectionError("websocket handshake: connection closed")
            head += chunk
        status, _, rest = head.partition(b"\r\n\r\n")
        if b" 101 " not in status.split(b"\r\n", 1)[0]:
            raise ConnectionError(f"websocket handshake refused: {status[:200]!r}")
        self.buf = rest

    def send(self, text: str) -> None:
        payload = text.encode()
        n = len(payload)
        header = bytes([0x81])
        if n < 126:
            header += bytes([0x80 | n])
        elif n < 65536:
            header += bytes([0x80 | 126]) + struct.pack(">H", n)
        else:
            header += bytes([0x80 | 127]) + struct.pack(">Q", n)
        mask = os.urandom(4)
        masked = bytes(b ^ mask[i % 4] for i, b in enumerate(payload))
        self.sock.sendall(header + mask + masked)

    def _read(self, n: int) -> bytes:
        while len(self.buf) < n:
            chunk = self.sock.recv(1 << 16)
            if not chunk:
                raise ConnectionError("websocket closed")
            self.buf += chunk
        out, self.buf = self.buf[:n], self.buf[n:]
        return out

    def recv(self) -> str:
        parts = []
        while True:
            b0, b1 = self._read(2)
            opcode, fin = b0 & 0x0F, b0 & 0x80
            n = b1 & 0x7F
            if n == 126:
                n = struct.unpack(">H", self._read(2))[0]
            elif n == 127:
                n = struct.unpack(">Q", self._read(8))[0]
            mask = self._read(4) if b1 & 0x80 else None
            data = self._read(n)
            if mask:
                data = bytes(b ^ mask[i % 4] for i, b in enumerate(data))
            if opcode == 0x8:
                raise ConnectionError("websocket closed by peer")
            if opcode == 0x9:  # ping: answer pong
                self.sock.sendall(bytes([0x8A, 0x80 | len(data)]) + b"\0\0\0\0" + data)
                continue
            if opcode in (0x1, 0x2, 0x0):
                parts.append(data)
                if fin:
                    return b"".join(parts).decode()

    def close(self) -> None:
        try:
            self.sock.close()
        except OSError:
            pass


class Browser:
    """Headless Chromium driven through DevTools: open a page, collect console errors, evaluate."""

    def __init__(self, executable: str, user_data_dir: Path, timeout: float = 60.0):
        self.timeout = timeout
        user_data_dir.mkdir(parents=True, exist_ok=True)
        self.proc = subprocess.Popen(
            [executable, *CHROMIUM_FLAGS, f"--user-data-dir={user_data_dir}", "--remote-debugging-port=0",
             "about:blank"],
            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        url = None
        deadline = time.monotonic() + timeout
        lines = []
        while time.monotonic() < deadline and url is None:
            ready, _, _ = select.select([self.proc.stderr], [], [], 1.0)
            if ready:
                line = self.proc.stderr.readline()
                if not line and self.proc.poll() is not None:
                    break
                lines.append(line)
                m = re.search(r"DevTools listening on (ws://\S+)", line)
                if m:
                    url = m.group(1)
        if url is None:
            self.close()
            raise RuntimeError("chromium did not start DevTools:\n" + "".join(lines[-20:]))
        self.ws = _WebSocket(url, timeout=timeout)
        self._id = 0
        self.events: list[dict] = []

    def call(self, method: str, params: dict | None = None, session: str | None = None) -> dict:
        self._id += 1
        msg = {"id": self._id, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = session
        self.ws.send(json.dumps(msg))
        deadline = time.monotonic() + self.timeout
        while time.monotonic() < deadline:
            reply = json.loads(self.ws.recv())
            if reply.get("id") == self._id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            self.events.append(reply)
        raise TimeoutError(method)

    def wait_for(self, event: str, session: str | None = None) -> dict:
        for i, e in enumerate(self.events):
            if e.get("method") == event and (session is None or e.get("sessionId") == session):
                return self.events.pop(i)
        deadline = time.monotonic() + self.timeout
        while time.monotonic() < deadline:
            e = json.loads(self.ws.recv())
            if e.get("method") == event and (session is None or e.get("sessionId") == session):
                return e
            self.events.append(e)
        raise TimeoutError(event)

    def open(self, url: str, width: int = 1280, height: int = 900) -> str:
        """Open `url` in a new tab, wait for its load event; return the session id."""
        target = self.call("Target.createTarget", {"url": "about:blank"})["targetId"]
        session = self.call("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
        for domain in ("Page", "Runtime", "Log", "Network"):
            self.call(f"{domain}.enable", session=session)
        self.call("Emulation.setDeviceMetricsOverride",
                  {"width": width, "height": height, "deviceScaleFactor": 1, "mobile": False}, session=session)
        self.call("Page.navigate", {"url": url}, session=session)
        self.wait_for("Page.loadEventFired", session)
        return session

    def evaluate(self, expression: str, session: str):
        r = self.call("Runtime.evaluate", {"expression": expression, "returnByValue": True,
                                            "awaitPromise": True}, session=session)
        if "exceptionDetails" in r:
            raise RuntimeError(f"page script failed: {r['exceptionDetails']}")
        return r["result"].get("value")

    def console_errors(self, session: str) -> list[str]:
        """Console errors, uncaught exceptions and browser log errors seen so far on the page."""
        out = []
        for e in self.events:
            if e.get("sessionId") != session:
                continue
            m, p = e.get("method"), e.get("params", {})
            if m == "Runtime.consoleAPICalled" and p.get("type") in ("error", "assert"):
                out.append("console: " + " ".join(str(a.get("value", a.get("description", ""))) for a in p.get("args", [])))
            elif m == "Runtime.exceptionThrown":
                out.append("exception: " + str(p.get("exceptionDetails", {}).get("text")))
            elif m == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
                entry = p["entry"]
                out.append(f"log: {entry.get('text')} {entry.get('url', '')}")
        return out

    def requests(self, session: str) -> list[str]:
        """URLs the page requested (network, file and data URLs alike)."""
        return [e["params"]["request"]["url"] for e in self.events
                if e.get("sessionId") == session and e.get("method") == "Network.requestWillBeSent"]

    def screenshot(self, session: str, path: Path) -> Path:
        """Full-page PNG screenshot."""
        h = self.evaluate("Math.ceil(document.documentElement.scrollHeight)", session)
        self.call("Emulation.setDeviceMetricsOverride",
                  {"width": 1280, "height": int(h), "deviceScaleFactor": 1, "mobile": False}, session=session)
        data = self.call("Page.captureScreenshot", {"format": "png", "captureBeyondViewport": True},
                         session=session)["data"]
        path.write_bytes(base64.b64decode(data))
        return path

    def close(self) -> None:
        try:
            if getattr(self, "ws", None):
                self.ws.close()
        finally:
            if self.proc.poll() is None:
                self.proc.terminate()
                try:
                    self.proc.wait(10)
                except subprocess.TimeoutExpired:
                    self.proc.kill()
                    self.proc.wait(5)
