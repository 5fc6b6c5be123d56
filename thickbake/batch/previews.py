"""Batch previews: a viewer page beside each asset's map and a back-lit still for the report.

Opt-in (``thickbake batch --previews``), because each still starts a headless Chromium: a few seconds
per asset in software WebGL (README, "Preview", gives the measured cost).  A page whose bytes would not
change is not rewritten, so an up-to-date asset keeps its files untouched.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Callable

from thickbake.errors import ThickbakeError

#: Pixels of a still in the report: twice the thumbnail's side, so it stays sharp on a dense screen.
STILL_SIZE = (256, 256)
#: ``OUT/<folders>/<map stem>`` + this is the asset's viewer page.
PAGE_SUFFIX = ".view.html"


def page_rel(map_rel: str) -> str:
    """Viewer page path relative to OUT for a map path relative to OUT: ``a/leaf.thickness.png`` →
    ``a/leaf.thickness.view.html``."""
    path = Path(map_rel)
    return path.with_name(path.stem + PAGE_SUFFIX).as_posix()


def batch_previews(plan, stills: bool = True, notify: Callable[[str], None] | None = None,
                   progress: Callable[[float, int, str], None] | None = None) -> dict[str, dict]:
    """Write each mapped asset's viewer page with all its maps (and render its still); per asset source path a dict with
    ``page`` (relative to OUT), ``still`` (PNG bytes or None), ``seconds`` and ``still_seconds``.

    An asset whose preview fails gets a warning through ``notify`` and no entry; the batch goes on.
    """
    notify = notify or (lambda text: None)
    jobs = [j for j in plan.jobs if j.status in ("baked", "skipped") and _maps_of(plan, j)]
    out: dict[str, dict] = {}
    for done, job in enumerate(jobs):
        shown = _preview(plan, job, stills, notify)
        if shown is None:
            continue
        out[job.asset.rel] = shown
        if progress is not None:
            progress((done + 1) / len(jobs), 0, f"preview {job.asset.rel}")
    return out


def _preview(plan, job, stills: bool, notify: Callable[[str], None]) -> dict | None:
    """Write one asset's viewer page (unless its bytes are already there) and render its still; the
    entry :func:`batch_previews` returns for it, or None (after a warning) when its preview failed."""
    from thickbake.maps.files import atomic_write_bytes
    from thickbake.preview.page import build_preview
    from thickbake.preview.still import render_still

    started = time.perf_counter()
    rel = page_rel(job.asset.map_rel)
    try:
        preview = build_preview(job.asset.source, _maps_of(plan, job))
        data = preview.html.encode("utf-8")
        target = plan.out / rel
        if not (target.is_file() and target.read_bytes() == data):
            atomic_write_bytes(target, data)
        frame = render_still(preview.html, *STILL_SIZE) if stills else None
    except ThickbakeError as exc:
        notify(f"warning: {job.asset.rel}: no preview ({exc.one_line()})")
        return None
    still, still_seconds = None, None
    if frame is not None and (frame.errors or not frame.png):
        notify(f"warning: {job.asset.rel}: the preview page reported {'; '.join(frame.errors)[:200] or 'no frame'}")
    elif frame is not None:
        still, still_seconds = frame.png, frame.seconds
    return {"page": rel, "still": still, "seconds": time.perf_counter() - started, "still_seconds": still_seconds}


def _maps_of(plan, job) -> list[Path]:
    """Every map file of an asset (one per material, UV set and tile), as the batch recorded them."""
    items = [plan.out / item["map"] for item in job.result.maps if item.get("map")] or [plan.out / job.asset.map_rel]
    return [p for p in items if p.is_file()]


__all__ = ["batch_previews", "page_rel", "STILL_SIZE", "PAGE_SUFFIX"]
