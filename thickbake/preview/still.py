"""A still of a viewer page, rendered by headless Chromium with the light straight behind the asset.

The page is served from memory on 127.0.0.1 (an ephemeral port, one thread) and opened with
``#still``: it renders one frame at the requested size and posts the canvas as a PNG together with
any console errors to ``/result`` on the same server.  So the still does not depend on when Chromium
would take a screenshot, and holds the canvas only (no window chrome).  WebGL runs in software
(SwiftShader), so no GPU is needed.  Chromium is started in its own process group and ended by its id.
"""

from __future__ import annotations

import base64
import http.server
import json
import os
import queue
import shutil
import signal
import subprocess
import tempfile
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

from thickbake.errors import ThickbakeError

#: Headless Chromium with software WebGL 2 (SwiftShader through ANGLE), no network services of its
#: own, no sandbox (CI runs as root) and a fresh profile per run.
CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--use-angle=swiftshader", "--enable-unsafe-swiftshader",
                  "--disable-background-networking", "--no-first-run", "--disable-component-update",
                  "--disable-sync", "--disable-default-apps", "--disable-extensions", "--mute-audio",
                  "--no-default-browser-check", "--disable-dev-shm-usage")
CHROMIUM_NAMES = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")
#: Environment variable naming the browser executable, when it is not on PATH under a usual name.
CHROMIUM_ENV = "THICKBAKE_CHROMIUM"


@dataclass
class Still:
    """One rendered frame.

    Attributes
    ----------
    png : bytes
        The canvas as a PNG (RGBA, 8 bits per channel, sRGB as the page wrote it).
    errors : list of str
        Console errors and uncaught exceptions of the page (empty when all went well).
    seconds : float
        Wall time from starting Chromium to receiving the frame.
    """

    png: bytes
    errors: list[str] = field(default_factory=list)
    seconds: float = 0.0
    webgl2: bool = False
    size: tuple[int, int] = (0, 0)


def find_chromium() -> str:
    """Path of a Chromium executable (``$THICKBAKE_CHROMIUM`` first), or a user error saying how to get one."""
    named = os.environ.get(CHROMIUM_ENV)
    if named:
        found = shutil.which(named)
        if not found:
            raise ThickbakeError(f"{CHROMIUM_ENV}={named} is not an executable", fix="point it at a Chromium binary")
        return found
    for name in CHROMIUM_NAMES:
        found = shutil.which(name)
        if found:
            return found
    raise ThickbakeError("rendering a still needs Chromium, and none was found",
                         fix=f"install it (Debian: apt-get install chromium) or set {CHROMIUM_ENV}")


class _Handler(http.server.BaseHTTPRequestHandler):
    page: bytes = b""
    results: queue.Queue

    def do_GET(self):  # noqa: N802 - http.server API
        if self.path.split("?", 1)[0] in ("/", "/view.html"):
            self.send_response(200)
            self.send_header("Content-Type", "text/html; charset=utf-8")
            self.send_header("Content-Length", str(len(self.page)))
            self.end_headers()
            self.wfile.write(self.page)
        else:
            self.send_response(404)
            self.end_headers()

    def do_POST(self):  # noqa: N802
        body = self.rfile.read(int(self.headers.get("Content-Length", 0)))
        if self.path == "/result":
            self.results.put(body)
        self.send_response(204)
        self.end_headers()

    def log_message(self, *args):
        pass


def end_process_group(proc: subprocess.Popen) -> None:
    """End the Chromium we started and its helpers (its own process group, by id)."""
    for sig in (signal.SIGTERM, signal.SIGKILL):
        try:
            os.killpg(proc.pid, sig)
        except ProcessLookupError:
            return
        try:
            proc.wait(timeout=10)
            return
        except subprocess.TimeoutExpired:
            continue


def render_still(page_html: str, width: int = 800, height: int = 600, params: str = "",
                 timeout: float = 90.0) -> Still:
    """Render one frame of a viewer page in headless Chromium.

    Parameters
    ----------
    page_html : str
        The page as :func:`thickbake.preview.page.page_html` writes it.
    width, height : int
        Pixels of the still.
    params : str
        Extra URL-fragment parameters (``key=value&...``, see ``viewer.js``), e.g. the camera or the
        term's parameters; the light stays opposite the camera unless ``lightaz``/``lightel`` are given.
    timeout : float
        Seconds to wait for the frame.

    Raises
    ------
    ThickbakeError
        No Chromium, or no frame within ``timeout`` (the message quotes the browser's last words).
    """
    exe = find_chromium()
    results: queue.Queue = queue.Queue()
    handler = type("Handler", (_Handler,), {"page": page_html.encode("utf-8"), "results": results})
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    fragment = "&".join(p for p in ("still", f"size={int(width)},{int(height)}", params) if p)
    url = f"http://127.0.0.1:{server.server_address[1]}/view.html#{fragment}"
    started = time.perf_counter()
    try:
        with tempfile.TemporaryDirectory(prefix="thickbake-chromium-") as profile, tempfile.TemporaryFile() as log:
            cmd = [exe, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", f"--window-size={int(width)},{int(height)}", url]
            proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=log,
                                    start_new_session=True)
            try:
                body = results.get(timeout=timeout)
            except queue.Empty:
                body = None
            finally:
                end_process_group(proc)
            if body is None:
                log.seek(0)
                tail = " ".join(log.read().decode("utf-8", "replace").split())[-300:]
                raise ThickbakeError(f"Chromium drew no frame within {timeout:.0f} s ({tail or 'no output'})",
                                     fix="check that Chromium starts headless on this machine")
    finally:
        server.shutdown()
        server.server_close()
    seconds = time.perf_counter() - started
    result = json.loads(body)
    png_url = result.get("png") or ""
    png = base64.b64decode(png_url.split(",", 1)[1]) if png_url.startswith("data:image/png;base64,") else b""
    return Still(png=png, errors=list(result.get("errors") or []), seconds=seconds,
                 webgl2=bool(result.get("webgl2")), size=(int(result.get("width") or 0), int(result.get("height") or 0)))


def write_still(still: Still, out: str | os.PathLike) -> Path:
    """Write the still's PNG atomically; a page that failed to draw is a user-facing error."""
    from thickbake.maps.files import atomic_write_bytes

    if not still.png:
        raise ThickbakeError("the viewer drew nothing: " + "; ".join(still.errors)[:300], path=out,
                             fix="rerun with --debug and report the page's errors")
    return atomic_write_bytes(out, still.png)


__all__ = ["Still", "render_still", "write_still", "find_chromium", "CHROMIUM_FLAGS"]
