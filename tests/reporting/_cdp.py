"""A minimal DevTools-protocol driver for headless Chromium over ``--remote-debugging-pipe`` (no extra packages).

Chromium reads JSON commands from file descriptor 3 and writes replies and events to descriptor 4, each message
ended by a NUL byte (the protocol's documented pipe transport).
"""

from __future__ import annotations

import base64
import json
import os
import select
import subprocess
import time

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync", "--hide-scrollbars"]


class Browser:
    def __init__(self, chromium: str, profile: str, timeout: float = 60.0):
        cmd_r, self._cmd_w = os.pipe()
        self._out_r, out_w = os.pipe()
        args = " ".join(f"'{a}'" for a in [chromium, *FLAGS, f"--user-data-dir={profile}",
                                            "--remote-debugging-pipe", "about:blank"])
        self._proc = subprocess.Popen(["bash", "-c", f"exec {args} 3<&{cmd_r} 4>&{out_w}"],
                                      pass_fds=(cmd_r, out_w), stdout=subprocess.DEVNULL,
                                      stderr=subprocess.DEVNULL)
        os.close(cmd_r)
        os.close(out_w)
        self._timeout = timeout
        self._buffer = b""
        self._next = 0
        self._events: list[dict] = []
        targets = self.call("Target.getTargets")["targetInfos"]
        page = next(t for t in targets if t["type"] == "page")
        self._session = self.call("Target.attachToTarget", targetId=page["targetId"], flatten=True)["sessionId"]
        self.call("Page.enable", session=True)
        self.call("Runtime.enable", session=True)

    # ------------------------------------------------------------------ transport
    def _read(self) -> dict:
        deadline = time.monotonic() + self._timeout
        while b"\0" not in self._buffer:
            left = deadline - time.monotonic()
            if left <= 0 or not select.select([self._out_r], [], [], left)[0]:
                raise TimeoutError("no reply from Chromium")
            chunk = os.read(self._out_r, 1 << 20)
            if not chunk:
                raise RuntimeError("Chromium closed the DevTools pipe")
            self._buffer += chunk
        message, self._buffer = self._buffer.split(b"\0", 1)
        return json.loads(message)

    def call(self, method: str, *, session: bool = False, **params) -> dict:
        self._next += 1
        message = {"id": self._next, "method": method, "params": params}
        if session:
            message["sessionId"] = self._session
        os.write(self._cmd_w, json.dumps(message).encode() + b"\0")
        while True:
            reply = self._read()
            if reply.get("id") == self._next:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            self._events.append(reply)

    def wait_event(self, method: str) -> dict:
        while True:
            for i, event in enumerate(self._events):
                if event.get("method") == method:
                    return self._events.pop(i)
            self._events.append(self._read())

    # ------------------------------------------------------------------ page
    def open(self, url: str, *, width: int, height: int = 900, print_media: bool = False) -> None:
        self.call("Emulation.setDeviceMetricsOverride", session=True, width=width, height=height,
                  deviceScaleFactor=1, mobile=width < 600)
        self.call("Emulation.setEmulatedMedia", session=True, media="print" if print_media else "")
        for target in ("about:blank", url):  # a fresh document each time (a new #fragment alone loads nothing)
            self._events.clear()
            self.call("Page.navigate", session=True, url=target)
            self.wait_event("Page.loadEventFired")

    def evaluate(self, expression: str):
        result = self.call("Runtime.evaluate", session=True, expression=expression, returnByValue=True,
                           awaitPromise=True)
        if "exceptionDetails" in result:
            raise RuntimeError(f"page script failed: {result['exceptionDetails']}")
        return result["result"].get("value")

    def screenshot(self) -> bytes:
        return base64.b64decode(self.call("Page.captureScreenshot", session=True, format="png",
                                          captureBeyondViewport=True)["data"])

    def print_pdf(self, **options) -> bytes:
        return base64.b64decode(self.call("Page.printToPDF", session=True, **options)["data"])

    def close(self) -> None:
        try:
            self.call("Browser.close")
        except Exception:  # noqa: BLE001 - the browser may already be gone
            pass
        try:
            self._proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            self._proc.kill()
        os.close(self._cmd_w)
        os.close(self._out_r)
