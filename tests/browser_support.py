"""Test helpers for checks that need the outside world's tools: Node packages and headless Chromium.

* :func:`node_tools` — node and the packages of ``tests/browser/package.json`` (installed there by
  ``.ci/run``'s ``install_browser_tools``; a developer runs ``npm ci --prefix tests/browser``).
* :func:`validate_gltf` — the Khronos glTF Validator (npm ``gltf-validator``) on written files.
* :func:`serve` — a local HTTP server on 127.0.0.1 (ephemeral port, a thread) that maps URL
  prefixes to folders and receives the page's result as ``POST /result``.
* :func:`run_page` — headless Chromium on a page of that server; returns the JSON the page posted.

A page reports by posting JSON to ``/result`` (see ``tests/browser/volume_check.mjs``), so the
test does not depend on when Chromium would dump the DOM.  Missing tools skip the test with the
reason — except under CI (``CI`` set), where a missing tool is a failure: CI installs them.
"""

from __future__ import annotations

import contextlib
import http.server
import json
import os
import queue
import shutil
import subprocess
import tempfile
import threading
from pathlib import Path

import pytest

from thickbake.preview.still import end_process_group

BROWSER_DIR = Path(__file__).parent / "browser"
NODE_MODULES = BROWSER_DIR / "node_modules"
#: Headless Chromium flags: software WebGL through SwiftShader (no GPU on CI), no network services
#: of its own, no sandbox (CI runs as root), and a fresh profile per run.
CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--use-angle=swiftshader", "--enable-unsafe-swiftshader",
                  "--disable-background-networking", "--no-first-run", "--disable-component-update",
                  "--disable-sync", "--disable-default-apps", "--disable-extensions", "--mute-audio",
                  "--no-default-browser-check", "--disable-dev-shm-usage")


def _unavailable(reason: str):
    """Skip with the reason; under CI a missing tool fails the test instead (CI must have them)."""
    if os.environ.get("CI"):
        pytest.fail(f"{reason} (CI installs it in .ci/run install_browser_tools)")
    pytest.skip(reason)


def node_tools() -> str:
    """Path of node, with the npm packages installed; skips (or fails under CI) otherwise."""
    node = shutil.which("node")
    if node is None:
        _unavailable("node is not installed (apt-get install nodejs npm)")
    for package in ("gltf-validator", "three"):
        if not (NODE_MODULES / package / "package.json").is_file():
            _unavailable(f"npm package {package} is missing: run npm ci --prefix tests/browser")
    return node


def chromium() -> str:
    """Path of the Chromium executable; skips (or fails under CI) when there is none."""
    for name in ("chromium", "chromium-browser", "google-chrome"):
        path = shutil.which(name)
        if path:
            return path
    _unavailable("Chromium is not installed (apt-get install chromium)")


def validate_gltf(paths) -> list[dict]:
    """Run the Khronos glTF Validator on each file; per file a dict with numErrors, numWarnings and messages."""
    node = node_tools()
    proc = subprocess.run([node, str(BROWSER_DIR / "validate.mjs"), *map(str, paths)], capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout)


class _Handler(http.server.SimpleHTTPRequestHandler):
    routes: dict = {}
    results: queue.Queue

    def translate_path(self, path):
        path = path.split("?", 1)[0].split("#", 1)[0]
        for prefix, folder in sorted(self.routes.items(), key=lambda kv: -len(kv[0])):
            if path.startswith(prefix):
                rel = path[len(prefix):].lstrip("/")
                target = (Path(folder) / rel).resolve()
                if Path(folder).resolve() in target.parents or target == Path(folder).resolve():
                    return str(target)
        return str(Path(tempfile.gettempdir()) / "no-such-file-thickbake")

    def do_POST(self):  # noqa: N802 - http.server API
        length = int(self.headers.get("Content-Length", 0))
        body = self.rfile.read(length)
        if self.path == "/result":
            self.results.put(body.decode("utf-8"))
        self.send_response(204)
        self.end_headers()

    def end_headers(self):
        self.send_header("Cache-Control", "no-store")
        super().end_headers()

    def log_message(self, *args):  # keep test output clean
        pass


_Handler.extensions_map = dict(http.server.SimpleHTTPRequestHandler.extensions_map, **{".mjs": "text/javascript",
                                                                                       ".js": "text/javascript",
                                                                                       ".glb": "model/gltf-binary"})


@contextlib.contextmanager
def serve(routes: dict[str, Path]):
    """Serve ``{url prefix: folder}`` on 127.0.0.1; yields (base URL, queue of posted results)."""
    results: queue.Queue = queue.Queue()
    handler = type("Handler", (_Handler,), {"routes": dict(routes), "results": results})
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}", results
    finally:
        server.shutdown()
        server.server_close()


def run_page(url: str, results: queue.Queue, timeout: float = 60.0, window: str = "256,256") -> dict:
    """Open ``url`` in headless Chromium and wait for the page to post its JSON result.

    Returns the parsed result with ``"chromium_log"`` (Chromium's stderr) added.  Chromium is
    ended (by its own process id) as soon as the result arrives.
    """
    exe = chromium()
    with tempfile.TemporaryDirectory(prefix="thickbake-chromium-") as profile:
        cmd = [exe, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", f"--window-size={window}",
               "--enable-logging=stderr", "--v=0", url]
        log = tempfile.TemporaryFile()
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=log, start_new_session=True)
        try:
            try:
                body = results.get(timeout=timeout)
            except queue.Empty:
                body = None
        finally:
            end_process_group(proc)
        log.seek(0)
        text = log.read().decode("utf-8", "replace")
        log.close()
    assert body is not None, f"the page posted no result within {timeout:.0f} s; Chromium said:\n{text[-3000:]}"
    result = json.loads(body)
    result["chromium_log"] = text
    return result


__all__ = ["node_tools", "chromium", "validate_gltf", "serve", "run_page", "BROWSER_DIR", "NODE_MODULES",
           "CHROMIUM_FLAGS"]
