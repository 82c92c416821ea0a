"""A headless Chromium driven over the DevTools protocol through --remote-debugging-pipe (stdlib only).

The pipe is the protocol's own transport: Chromium reads JSON commands, each ended by a NUL
byte, on file descriptor 3 and writes replies and events on descriptor 4. Each page records
what the checks need: console errors and uncaught exceptions, log entries (failed loads,
security-policy violations), every request the page made, and dialogs it opened.
"""
from __future__ import annotations

import base64
import json
import os
import queue
import shutil
import subprocess
import tempfile
import threading
import time
from pathlib import Path

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking", "--no-first-run",
         "--disable-extensions", "--disable-sync", "--disable-component-update", "--mute-audio",
         "--remote-debugging-pipe"]


def find_chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome", "chrome"):
        path = shutil.which(name)
        if path:
            return path
    return None


class ProtocolError(RuntimeError):
    pass


class Browser:
    def __init__(self, binary: str, timeout: float = 30.0):
        self.profile = tempfile.mkdtemp(prefix="unitlens-chromium-")
        to_child_r, self._w = os.pipe()
        self._r, from_child_w = os.pipe()

        def fds():  # in the child: our pipe ends become its descriptors 3 and 4
            a, b = os.dup(to_child_r), os.dup(from_child_w)
            os.dup2(a, 3)
            os.dup2(b, 4)

        self.proc = subprocess.Popen([binary, *FLAGS, f"--user-data-dir={self.profile}", "about:blank"],
                                     preexec_fn=fds, close_fds=False, stdin=subprocess.DEVNULL,
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        os.close(to_child_r)
        os.close(from_child_w)
        self._next = 0
        self._lock = threading.Lock()
        self._replies: dict[int, queue.Queue] = {}
        self._pages: dict[str, Page] = {}
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()
        self.timeout = timeout
        self.version = self.call("Browser.getVersion")["product"]

    def _read(self) -> None:
        buf = b""
        while True:
            try:
                chunk = os.read(self._r, 1 << 16)
            except OSError:
                return
            if not chunk:
                return
            buf += chunk
            while b"\0" in buf:
                raw, buf = buf.split(b"\0", 1)
                msg = json.loads(raw)
                if "id" in msg:
                    q = self._replies.get(msg["id"])
                    if q:
                        q.put(msg)
                elif msg.get("sessionId") in self._pages:
                    self._pages[msg["sessionId"]]._event(msg["method"], msg.get("params", {}))

    def send(self, method: str, params: dict | None = None, session: str | None = None) -> queue.Queue:
        with self._lock:
            self._next += 1
            mid = self._next
            q: queue.Queue = queue.Queue()
            self._replies[mid] = q
            msg = {"id": mid, "method": method, "params": params or {}}
            if session:
                msg["sessionId"] = session
            os.write(self._w, json.dumps(msg).encode() + b"\0")
        return q

    def call(self, method: str, params: dict | None = None, session: str | None = None, timeout=None) -> dict:
        q = self.send(method, params, session)
        try:
            msg = q.get(timeout=timeout or self.timeout)
        except queue.Empty:
            raise ProtocolError(f"{method}: no reply within {timeout or self.timeout} s") from None
        if "error" in msg:
            raise ProtocolError(f"{method}: {msg['error']}")
        return msg.get("result", {})

    def page(self, width: int = 1280, height: int = 900, dark: bool = False) -> "Page":
        target = self.call("Target.createTarget", {"url": "about:blank"})["targetId"]
        session = self.call("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
        p = Page(self, target, session)
        self._pages[session] = p
        for domain in ("Page", "Runtime", "Log", "Network"):
            p.call(f"{domain}.enable")
        p.call("Emulation.setDeviceMetricsOverride", {"width": width, "height": height, "deviceScaleFactor": 1,
                                                      "mobile": False})
        p.call("Page.bringToFront")  # a background tab gets no animation frames
        p.call("Emulation.setEmulatedMedia", {"features": [
            {"name": "prefers-color-scheme", "value": "dark" if dark else "light"}]})
        return p

    def close(self) -> None:
        try:
            self.send("Browser.close")
            self.proc.wait(timeout=5)
        except Exception:  # noqa: BLE001  (a browser that will not close politely is killed)
            self.proc.kill()
            self.proc.wait()
        for fd in (self._w, self._r):
            try:
                os.close(fd)
            except OSError:
                pass
        shutil.rmtree(self.profile, ignore_errors=True)


class Page:
    def __init__(self, browser: Browser, target: str, session: str):
        self.browser, self.target, self.session = browser, target, session
        self.console: list[tuple[str, str]] = []  # (level, text)
        self.exceptions: list[str] = []
        self.requests: list[str] = []
        self.dialogs: list[str] = []
        self._loaded = threading.Event()

    def call(self, method: str, params: dict | None = None, timeout=None) -> dict:
        return self.browser.call(method, params, self.session, timeout)

    def _event(self, method: str, p: dict) -> None:
        if method == "Runtime.consoleAPICalled":
            text = " ".join(str(a.get("value", a.get("description", ""))) for a in p.get("args", []))
            self.console.append((p.get("type", ""), text))
        elif method == "Runtime.exceptionThrown":
            d = p.get("exceptionDetails", {})
            self.exceptions.append(d.get("exception", {}).get("description") or d.get("text", "?"))
        elif method == "Log.entryAdded":
            e = p.get("entry", {})
            self.console.append((e.get("level", ""), f"{e.get('source', '')}: {e.get('text', '')} {e.get('url', '')}"))
        elif method == "Network.requestWillBeSent":
            self.requests.append(p["request"]["url"])
        elif method == "Page.javascriptDialogOpening":
            self.dialogs.append(p.get("message", ""))
            self.browser.send("Page.handleJavaScriptDialog", {"accept": True}, self.session)
        elif method == "Page.loadEventFired":
            self._loaded.set()

    @property
    def errors(self) -> list[str]:
        return [t for level, t in self.console if level in ("error", "assert")] + self.exceptions

    def goto(self, url: str, timeout: float = 20.0) -> None:
        self._loaded.clear()
        r = self.call("Page.navigate", {"url": url})
        if r.get("errorText"):
            raise ProtocolError(f"navigate {url}: {r['errorText']}")
        if not self._loaded.wait(timeout):
            raise ProtocolError(f"{url} did not finish loading in {timeout} s")

    def js(self, expression: str, timeout=None):
        r = self.call("Runtime.evaluate", {"expression": expression, "returnByValue": True, "awaitPromise": True},
                      timeout)
        if "exceptionDetails" in r:
            raise ProtocolError(f"{expression!r} threw: {r['exceptionDetails'].get('exception', {}).get('description')}")
        return r["result"].get("value")

    def wait_for(self, expression: str, timeout: float = 10.0):
        end = time.monotonic() + timeout
        while True:
            v = self.js(expression)
            if v:
                return v
            if time.monotonic() > end:
                raise ProtocolError(f"timed out waiting for {expression!r}")
            time.sleep(0.05)

    def key(self, key: str) -> None:
        codes = {"ArrowRight": 39, "ArrowLeft": 37, "Escape": 27, "Enter": 13}
        base = {"key": key, "code": key if key in codes else f"Key{key.upper()}",
                "windowsVirtualKeyCode": codes[key] if key in codes else ord(key.upper())}
        self.call("Input.dispatchKeyEvent", {"type": "keyDown", **base, **({"text": key} if len(key) == 1 else {})})
        self.call("Input.dispatchKeyEvent", {"type": "keyUp", **base})

    def screenshot(self, path: Path, full: bool = False) -> Path:
        params = {"format": "png"}
        if full:
            params["captureBeyondViewport"] = True
        data = self.call("Page.captureScreenshot", params, timeout=30)["data"]
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(base64.b64decode(data))
        return path

    def close(self) -> None:
        self.browser.call("Target.closeTarget", {"targetId": self.target})
        self.browser._pages.pop(self.session, None)
