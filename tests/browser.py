"""Open a page in headless Chromium and read what a person would see.

Talks to the browser over its DevTools protocol through a pair of pipes
(``--remote-debugging-pipe``: commands on file descriptor 3, answers on 4,
each message JSON ended by a NUL byte), so it needs only the Debian package
``chromium`` and the standard library — no driver, no websocket client.

:func:`open_page` loads a file, waits for its load event (which waits for
every image), collects console errors, failed loads and script exceptions,
evaluates a script that lists the images and the tables, and renders the page
to PDF and to a full-page PNG screenshot.
"""

from __future__ import annotations

import base64
import json
import os
import shutil
import subprocess
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

#: Flags Chromium needs in this sandboxed, offline, GPU-less setting.
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--hide-scrollbars", "--remote-debugging-pipe"]

_PAGE_SCRIPT = """(() => ({
  title: document.title,
  images: [...document.images].map(i => ({src: i.getAttribute('src'), complete: i.complete,
                                         width: i.naturalWidth, height: i.naturalHeight})),
  tables: [...document.querySelectorAll('table[data-csv]')].map(t => ({
    csv: t.dataset.csv,
    header: [...t.tHead.rows[0].cells].map(c => c.textContent),
    rows: [...t.tBodies[0].rows].map(r => [...r.cells].map(c => c.textContent)),
  })),
  text: document.body.innerText,
}))()"""


def find_chromium() -> str | None:
    """Path of a Chromium binary, or None."""
    for name in ("chromium", "chromium-browser", "google-chrome", "chrome"):
        found = shutil.which(name)
        if found:
            return found
    return None


@dataclass
class PageView:
    """What the browser saw: images, tables, text, errors and renderings."""

    title: str
    images: list
    tables: list
    text: str
    errors: list = field(default_factory=list)
    pdf: bytes = b""
    png: bytes = b""


class _Pipe:
    def __init__(self, binary: str, profile: str):
        cmd_r, self._cmd_w = os.pipe()
        self._res_r, res_w = os.pipe()

        def wire():  # runs in the child: the protocol's fixed descriptors 3 and 4, kept across exec
            a, b = os.dup(cmd_r), os.dup(res_w)  # copies first, in case either end already sits on 3 or 4
            os.dup2(a, 3)
            os.dup2(b, 4)
            os.set_inheritable(3, True)
            os.set_inheritable(4, True)

        self.proc = subprocess.Popen([binary, *FLAGS, f"--user-data-dir={profile}", "about:blank"],
                                     stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                     stderr=subprocess.DEVNULL, preexec_fn=wire, close_fds=False)
        os.close(cmd_r)
        os.close(res_w)
        self._buffer = b""
        self._next_id = 0
        self.events: list[dict] = []

    def send(self, method: str, params: dict | None = None, session: str | None = None,
             timeout: float = 60.0) -> dict:
        self._next_id += 1
        message = {"id": self._next_id, "method": method, "params": params or {}}
        if session:
            message["sessionId"] = session
        os.write(self._cmd_w, json.dumps(message).encode() + b"\0")
        deadline = time.monotonic() + timeout
        while True:
            reply = self._read(deadline)
            if reply.get("id") == self._next_id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            self.events.append(reply)

    def wait_for(self, method: str, timeout: float = 60.0) -> dict:
        for i, event in enumerate(self.events):
            if event.get("method") == method:
                return self.events.pop(i)
        deadline = time.monotonic() + timeout
        while True:
            event = self._read(deadline)
            if event.get("method") == method:
                return event
            self.events.append(event)

    def _read(self, deadline: float) -> dict:
        import select

        while b"\0" not in self._buffer:
            left = deadline - time.monotonic()
            if left <= 0 or not select.select([self._res_r], [], [], left)[0]:
                raise TimeoutError("Chromium did not answer in time")
            chunk = os.read(self._res_r, 1 << 20)
            if not chunk:
                raise RuntimeError("Chromium closed its DevTools pipe")
            self._buffer += chunk
        message, self._buffer = self._buffer.split(b"\0", 1)
        return json.loads(message)

    def close(self) -> None:
        try:
            self.send("Browser.close", timeout=10)
        except (RuntimeError, TimeoutError, OSError):
            pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        os.close(self._cmd_w)
        os.close(self._res_r)


def _errors(events: list[dict]) -> list[str]:
    out = []
    for e in events:
        method, params = e.get("method"), e.get("params", {})
        if method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "assert"):
            out.append("console: " + " ".join(str(a.get("value", a.get("description", ""))) for a in params.get("args", [])))
        elif method == "Runtime.exceptionThrown":
            out.append("exception: " + params.get("exceptionDetails", {}).get("text", ""))
        elif method == "Log.entryAdded" and params.get("entry", {}).get("level") == "error":
            entry = params["entry"]
            out.append(f"log: {entry.get('text')} {entry.get('url', '')}".strip())
    return out


def open_page(path: Path, width: int = 1280, height: int = 900, binary: str | None = None) -> PageView:
    """Load ``path`` in headless Chromium and return what it showed.

    Raises
    ------
    FileNotFoundError
        No Chromium on this machine.
    """
    binary = binary or find_chromium()
    if binary is None:
        raise FileNotFoundError("no Chromium binary on PATH")
    with tempfile.TemporaryDirectory(prefix="aftershift-chromium-") as profile:
        pipe = _Pipe(binary, profile)
        try:
            target = pipe.send("Target.createTarget", {"url": "about:blank"})["targetId"]
            session = pipe.send("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
            for domain in ("Page", "Runtime", "Log"):
                pipe.send(f"{domain}.enable", session=session)
            pipe.send("Emulation.setDeviceMetricsOverride",
                      {"width": width, "height": height, "deviceScaleFactor": 1, "mobile": False}, session=session)
            pipe.send("Page.navigate", {"url": Path(path).resolve().as_uri()}, session=session)
            pipe.wait_for("Page.loadEventFired", timeout=120)
            seen = pipe.send("Runtime.evaluate", {"expression": _PAGE_SCRIPT, "returnByValue": True},
                             session=session)["result"]["value"]
            pdf = base64.b64decode(pipe.send("Page.printToPDF", {"printBackground": True}, session=session,
                                             timeout=180)["data"])
            png = base64.b64decode(pipe.send("Page.captureScreenshot", {"format": "png", "captureBeyondViewport": True},
                                             session=session, timeout=180)["data"])
            time.sleep(0.2)  # let late console messages arrive
            pipe.send("Runtime.evaluate", {"expression": "1"}, session=session)
            return PageView(seen["title"], seen["images"], seen["tables"], seen["text"], _errors(pipe.events),
                            pdf, png)
        finally:
            pipe.close()
