"""Open a local page in headless Chromium (Debian's ``chromium``) and report what a person would see.

Talks to the browser over its DevTools pipe (``--remote-debugging-pipe``: JSON messages separated
by a NUL byte on file descriptors 3 and 4), so no driver or extra package is needed. Network access
is cut off for the page: a report must open from disk alone.
"""

from __future__ import annotations

import base64
import json
import os
import shutil
import subprocess
import tempfile
import time
from pathlib import Path

BROWSERS = ("chromium", "chromium-browser")


def find_browser() -> str | None:
    return next((p for p in map(shutil.which, BROWSERS) if p), None)


class _Pipe:
    def __init__(self, proc, write_fd: int, read_fd: int):
        self.proc, self.write_fd, self.read_fd = proc, write_fd, read_fd
        self.next_id, self.buffer, self.events = 0, b"", []

    def _read_message(self, deadline: float) -> dict:
        import select

        while b"\0" not in self.buffer:
            left = deadline - time.monotonic()
            if left <= 0:
                raise TimeoutError("the browser did not answer")
            ready, _, _ = select.select([self.read_fd], [], [], left)
            if ready:
                chunk = os.read(self.read_fd, 1 << 20)
                if not chunk:
                    raise EOFError("the browser closed its pipe")
                self.buffer += chunk
        raw, self.buffer = self.buffer.split(b"\0", 1)
        return json.loads(raw)

    def call(self, method: str, params: dict | None = None, session: str | None = None, timeout: float = 60.0):
        self.next_id += 1
        msg = {"id": self.next_id, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = session
        os.write(self.write_fd, json.dumps(msg).encode() + b"\0")
        deadline = time.monotonic() + timeout
        while True:
            reply = self._read_message(deadline)
            if reply.get("id") == self.next_id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            self.events.append(reply)

    def wait_for(self, method: str, timeout: float = 60.0) -> dict:
        deadline = time.monotonic() + timeout
        for i, event in enumerate(self.events):
            if event.get("method") == method:
                return self.events.pop(i)
        while True:
            event = self._read_message(deadline)
            if event.get("method") == method:
                return event
            self.events.append(event)


def open_page(path: str | os.PathLike, width: int = 1200, height: int = 1600) -> dict:
    """Load ``path`` (a local HTML file) with the network off; return its console errors, failed
    loads and a PNG screenshot (bytes)."""
    browser = find_browser()
    if browser is None:
        raise FileNotFoundError("no chromium on PATH")
    profile = tempfile.mkdtemp(prefix="shapes-browser-")
    to_browser_r, to_browser_w = os.pipe()
    from_browser_r, from_browser_w = os.pipe()
    proc = subprocess.Popen(
        [browser, "--headless", "--no-sandbox", "--disable-gpu", "--remote-debugging-pipe", "--no-first-run",
         f"--user-data-dir={profile}", "about:blank"],
        pass_fds=(3, 4, to_browser_r, from_browser_w), stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        preexec_fn=lambda: (os.dup2(to_browser_r, 3), os.dup2(from_browser_w, 4)))
    os.close(to_browser_r)
    os.close(from_browser_w)
    pipe = _Pipe(proc, to_browser_w, from_browser_r)
    try:
        target = pipe.call("Target.createTarget", {"url": "about:blank"})["targetId"]
        session = pipe.call("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
        for domain in ("Page", "Runtime", "Log", "Network"):
            pipe.call(f"{domain}.enable", session=session)
        pipe.call("Network.emulateNetworkConditions", {"offline": True, "latency": 0, "downloadThroughput": -1,
                                                        "uploadThroughput": -1}, session=session)
        pipe.call("Emulation.setDeviceMetricsOverride", {"width": width, "height": height, "deviceScaleFactor": 1,
                                                          "mobile": False}, session=session)
        pipe.call("Page.navigate", {"url": Path(path).resolve().as_uri()}, session=session)
        pipe.wait_for("Page.loadEventFired")
        shot = pipe.call("Page.captureScreenshot", {"format": "png"}, session=session)["data"]
        pipe.call("Runtime.evaluate", {"expression": "0"}, session=session)  # flush pending events
        errors = []
        for e in pipe.events:
            method, params = e.get("method"), e.get("params", {})
            if method == "Runtime.exceptionThrown":
                errors.append(params["exceptionDetails"].get("text", "exception"))
            elif method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "assert"):
                errors.append(" ".join(str(a.get("value", a.get("description", ""))) for a in params["args"]))
            elif method == "Log.entryAdded" and params["entry"].get("level") == "error":
                errors.append(params["entry"].get("text", "") + " " + params["entry"].get("url", ""))
            elif method == "Network.loadingFailed":
                errors.append(f"load failed: {params.get('errorText')}")
        title = pipe.call("Runtime.evaluate", {"expression": "document.title", "returnByValue": True},
                          session=session)["result"].get("value")
        images = pipe.call("Runtime.evaluate", {
            "expression": "Array.from(document.images).map(i => [i.complete, i.naturalWidth])",
            "returnByValue": True}, session=session)["result"].get("value")
        return {"errors": errors, "screenshot": base64.b64decode(shot), "title": title, "images": images}
    finally:
        try:
            pipe.call("Browser.close", timeout=10)
        except Exception:
            pass
        os.close(to_browser_w)
        os.close(from_browser_r)
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        shutil.rmtree(profile, ignore_errors=True)
