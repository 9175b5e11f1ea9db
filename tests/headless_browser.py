"""Open a page in headless Chromium (the Debian package) and look at it, with the standard library only.

Chromium is driven over the DevTools protocol on a pipe (``--remote-debugging-pipe``:
JSON messages separated by NUL bytes on file descriptors 3 and 4), so no
websocket or browser-automation package is needed and nothing is downloaded.

``look_at(path)`` loads a local HTML file and returns: a PNG screenshot of the
whole page, the bounding box of every ``figure.chart`` element, the console
errors and exceptions, and every network request other than the file itself.

Run as a script to make the README's screenshot of a report::

    python tests/headless_browser.py segments.html docs/report.png [--width 1000 --height 1400]
"""

from __future__ import annotations

import base64
import json
import os
import select
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

CANDIDATES = ("/usr/bin/chromium", "/usr/bin/chromium-browser", "/usr/bin/google-chrome")

FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--disable-extensions", "--disable-default-apps", "--mute-audio", "--hide-scrollbars",
    "--remote-debugging-pipe",
)


def find_chromium() -> str | None:
    for path in CANDIDATES:
        if os.path.exists(path) and os.access(path, os.X_OK):
            return path
    return shutil.which("chromium")


@dataclass
class PageLook:
    png: bytes
    charts: dict[str, dict[str, float]]  # figure id -> x, y, width, height (CSS pixels)
    errors: list[str] = field(default_factory=list)
    requests: list[str] = field(default_factory=list)  # URLs other than the page's own file
    page_size: tuple[float, float] = (0.0, 0.0)
    scale: float = 1.0


class _Pipe:
    """DevTools protocol over the pipe: send commands, collect events."""

    def __init__(self, proc: subprocess.Popen, write_fd: int, read_fd: int) -> None:
        self.proc, self.write_fd, self.read_fd = proc, write_fd, read_fd
        self.buffer = b""
        self.next_id = 0
        self.events: list[dict[str, Any]] = []

    def send(self, method: str, params: dict | None = None, session: str | None = None, timeout: float = 30.0) -> dict:
        self.next_id += 1
        msg: dict[str, Any] = {"id": self.next_id, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = session
        os.write(self.write_fd, json.dumps(msg).encode() + b"\0")
        want = self.next_id
        deadline = time.monotonic() + timeout
        while True:
            for m in self._read(deadline):
                if m.get("id") == want:
                    if "error" in m:
                        raise RuntimeError(f"{method}: {m['error']}")
                    return m.get("result", {})
                self.events.append(m)

    def wait_event(self, method: str, timeout: float = 30.0) -> dict:
        deadline = time.monotonic() + timeout
        while True:
            for i, m in enumerate(self.events):
                if m.get("method") == method:
                    return self.events.pop(i)
            self.events.extend(self._read(deadline))

    def _read(self, deadline: float) -> list[dict]:
        left = deadline - time.monotonic()
        if left <= 0:
            raise TimeoutError("the browser did not answer in time")
        ready, _, _ = select.select([self.read_fd], [], [], left)
        if not ready:
            raise TimeoutError("the browser did not answer in time")
        chunk = os.read(self.read_fd, 1 << 20)
        if not chunk:
            raise RuntimeError("the browser closed the DevTools pipe")
        self.buffer += chunk
        *done, self.buffer = self.buffer.split(b"\0")
        return [json.loads(d) for d in done if d]


def look_at(page: str | os.PathLike, width: int = 1200, height: int = 900, browser: str | None = None) -> PageLook:
    """Load a local HTML file in headless Chromium and report what it drew."""
    browser = browser or find_chromium()
    if browser is None:
        raise FileNotFoundError("no Chromium found (apt-get install -y chromium)")
    url = Path(page).resolve().as_uri()
    with tempfile.TemporaryDirectory(prefix="tillite-chromium-") as profile:
        to_browser_r, to_browser_w = os.pipe()
        from_browser_r, from_browser_w = os.pipe()
        # move the child's ends above 4 so that the dup2 calls below cannot overwrite each other
        to_browser_r, from_browser_w = _above_four(to_browser_r), _above_four(from_browser_w)
        # the browser reads commands on fd 3 and writes answers on fd 4
        def child_fds() -> None:
            os.dup2(to_browser_r, 3)
            os.dup2(from_browser_w, 4)

        proc = subprocess.Popen(
            [browser, *FLAGS, f"--user-data-dir={profile}", f"--window-size={width},{height}", "about:blank"],
            stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
            preexec_fn=child_fds, pass_fds=(3, 4, to_browser_r, from_browser_w),
        )
        os.close(to_browser_r)
        os.close(from_browser_w)
        pipe = _Pipe(proc, to_browser_w, from_browser_r)
        try:
            return _look(pipe, url, width, height)
        finally:
            try:
                pipe.send("Browser.close", timeout=5)
            except Exception:
                pass
            try:
                proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
            os.close(to_browser_w)
            os.close(from_browser_r)


def _above_four(fd: int) -> int:
    import fcntl

    moved = fcntl.fcntl(fd, fcntl.F_DUPFD, 10)
    os.close(fd)
    return moved


def _look(pipe: _Pipe, url: str, width: int, height: int) -> PageLook:
    target = pipe.send("Target.createTarget", {"url": "about:blank"})["targetId"]
    session = pipe.send("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
    for domain in ("Page", "Runtime", "Log", "Network"):
        pipe.send(f"{domain}.enable", session=session)
    pipe.send("Emulation.setDeviceMetricsOverride", {"width": width, "height": height, "deviceScaleFactor": 1, "mobile": False}, session=session)
    pipe.events.clear()
    pipe.send("Page.navigate", {"url": url}, session=session)
    pipe.wait_event("Page.loadEventFired")
    got = pipe.send("Runtime.evaluate", {"expression": _MEASURE, "returnByValue": True}, session=session)
    measured = got["result"]["value"]
    full_w, full_h = measured["width"], measured["height"]
    shot = pipe.send("Page.captureScreenshot", {
        "format": "png", "captureBeyondViewport": True,
        "clip": {"x": 0, "y": 0, "width": full_w, "height": full_h, "scale": 1},
    }, session=session, timeout=60)
    errors, requests = [], []
    for e in pipe.events:
        method, params = e.get("method"), e.get("params", {})
        if method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "assert"):
            errors.append(" ".join(str(a.get("value", a.get("description", ""))) for a in params.get("args", [])))
        elif method == "Runtime.exceptionThrown":
            errors.append(params.get("exceptionDetails", {}).get("text", "exception"))
        elif method == "Log.entryAdded" and params.get("entry", {}).get("level") == "error":
            errors.append(params["entry"].get("text", "error"))
        elif method == "Network.requestWillBeSent":
            req = params.get("request", {}).get("url", "")
            if req != url and not req.startswith("data:"):
                requests.append(req)
    return PageLook(
        png=base64.b64decode(shot["data"]), charts=measured["charts"], errors=errors, requests=requests,
        page_size=(full_w, full_h),
    )


_MEASURE = """(() => {
  const charts = {};
  for (const f of document.querySelectorAll('figure.chart')) {
    const svg = f.querySelector('svg');
    const r = (svg || f).getBoundingClientRect();
    charts[f.id] = {x: r.left + window.scrollX, y: r.top + window.scrollY, width: r.width, height: r.height};
  }
  return {charts, width: document.documentElement.scrollWidth, height: document.documentElement.scrollHeight};
})()"""


def region_is_drawn(png: bytes, box: dict[str, float], min_share: float = 0.01) -> bool:
    """True when at least ``min_share`` of the box's pixels differ from its most common colour (not blank)."""
    import io

    from PIL import Image

    image = Image.open(io.BytesIO(png)).convert("RGB")
    crop = image.crop((int(box["x"]), int(box["y"]), int(box["x"] + box["width"]), int(box["y"] + box["height"])))
    colours = crop.getcolors(maxcolors=crop.width * crop.height + 1) or []
    if not colours:
        return False
    total = sum(c for c, _ in colours)
    background = max(c for c, _ in colours)
    return total > 0 and (total - background) / total >= min_share


def save_screenshot(page: str, out: str, width: int = 1000, height: int = 1500) -> Path:
    """A small PNG of the top of the page (header, sizes, profile), for the README."""
    import io

    from PIL import Image

    look = look_at(page, width=width, height=height)
    image = Image.open(io.BytesIO(look.png)).convert("RGB")
    image = image.crop((0, 0, min(width, image.width), min(height, image.height)))
    image = image.resize((image.width * 2 // 3, image.height * 2 // 3), Image.LANCZOS)
    image = image.quantize(colors=256, method=Image.Quantize.FASTOCTREE, dither=Image.Dither.NONE)
    target = Path(out)
    target.parent.mkdir(parents=True, exist_ok=True)
    image.save(target, optimize=True)
    return target


if __name__ == "__main__":
    import argparse

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("page")
    parser.add_argument("out")
    parser.add_argument("--width", type=int, default=1000)
    parser.add_argument("--height", type=int, default=1500)
    args = parser.parse_args()
    print(save_screenshot(args.page, args.out, args.width, args.height))
    sys.exit(0)
