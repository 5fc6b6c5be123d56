"""Batch report: ``report.json`` (figures per asset and for the batch) and ``report.html`` (a contact sheet).

The HTML page is self-contained — inline CSS, each map's thumbnail embedded as a base64 PNG — so it
can be mailed or archived on its own.  Failures come first, each with its one-line error; then every
asset that has a map, baked in this run or skipped as up to date, with its figures.

>>> import numpy as np
>>> png = thumbnail_png(np.full((64, 64), 40000, np.uint16))
>>> png[:8] == b"\\x89PNG\\r\\n\\x1a\\n"
True
"""

from __future__ import annotations

import base64
import html
import io
import os
from datetime import datetime, timezone
from pathlib import Path, PurePosixPath

import numpy as np

from thickbake.version import __version__

#: Longest side of a thumbnail in pixels: large enough to recognise a UV layout, small enough that a
#: thousand assets stay a page of a few megabytes.
THUMBNAIL_SIDE = 128
#: Percentile of a map's values shown as white in its thumbnail (see :func:`thumbnail_png`).
THUMBNAIL_WHITE_PERCENTILE = 99.5
REPORT_JSON = "report.json"
REPORT_HTML = "report.html"

#: Order of the status groups on the page.
STATUS_ORDER = {"failed": 0, "not started": 1, "baked": 2, "skipped": 3}


def thumbnail_png(image: np.ndarray, side: int = THUMBNAIL_SIDE) -> bytes:
    """An 8-bit grayscale PNG of a map, at most ``side`` pixels on its longest side.

    Brightness is stretched per map (0 stays black, the 99.5th percentile becomes white), so a
    thumbnail shows the layout and its variation; the figures beside it give the values.

    Parameters
    ----------
    image : (h, w) uint8, uint16 or float32
        Map as stored: integer codes (PNG) or the measure itself (float TIFF).
    side : int
        Longest side of the thumbnail in pixels.
    """
    from PIL import Image

    image = np.asarray(image)
    if image.ndim == 3:
        image = image[..., 0]
    level = np.nan_to_num(image.astype(np.float64))
    # Black stays 0; white is the map's own bright end, so thin and thick assets both read well.
    # The 99.5th percentile keeps a few hot texels from darkening the rest.
    white = np.percentile(level, THUMBNAIL_WHITE_PERCENTILE) if level.size else 0.0
    if not white > 0:
        white = level.max() if level.size and level.max() > 0 else 1.0
    gray = np.round(np.clip(level / white, 0.0, 1.0) * 255).astype(np.uint8)
    h, w = gray.shape
    scale = min(1.0, side / max(h, w))
    size = (max(1, round(w * scale)), max(1, round(h * scale)))
    picture = Image.fromarray(gray)
    if size != (w, h):
        picture = picture.resize(size, Image.Resampling.BOX)
    buffer = io.BytesIO()
    picture.save(buffer, format="PNG", optimize=True)
    return buffer.getvalue()


def thumbnail_from_file(map_path: str | os.PathLike) -> bytes | None:
    """Thumbnail of a map on disk, or None if it cannot be read."""
    from thickbake.errors import ThickbakeError
    from thickbake.maps.files import read_image

    try:
        return thumbnail_png(read_image(map_path))
    except ThickbakeError:
        return None


def write_reports(out_dir: str | os.PathLike, report: dict, thumbnails: dict[str, bytes],
                  stills: dict[str, bytes | None] | None = None) -> tuple[Path, Path]:
    """Write ``report.json`` and ``report.html`` into ``out_dir`` atomically; return their paths.

    ``thumbnails`` maps each map's path relative to OUT (``report["assets"][i]["maps"][j]["map"]``) to PNG bytes.
    ``stills`` maps an asset's source path (``report["assets"][i]["source"]``) to the PNG bytes of its
    back-lit still.
    """
    from thickbake.maps.files import atomic_write_bytes, json_bytes

    out_dir = Path(out_dir)
    json_path = out_dir / REPORT_JSON
    html_path = out_dir / REPORT_HTML
    atomic_write_bytes(json_path, json_bytes(report))
    atomic_write_bytes(html_path, render_html(report, thumbnails, stills).encode("utf-8"))
    return json_path, html_path


# ---------------------------------------------------------------------------- report content
def build_report(plan, started_at: datetime, seconds: float, cores: int, jobs: int,
                 threads: int | None, cluster: str | None, force: bool, interrupted: bool,
                 previews: dict | None = None) -> dict:
    """The content of ``report.json`` for a :class:`thickbake.batch.plan.BatchPlan` whose jobs have run.

    ``previews``: per asset source path, its viewer page (relative to OUT) and the seconds its page and
    still took (:func:`thickbake.batch.previews.batch_previews`).
    """
    rows = [_report_row(job) for job in plan.jobs]
    for row in rows:
        shown = (previews or {}).get(row["source"])
        if shown:
            row["viewer"] = shown["page"]
            row["preview_seconds"] = round(shown["seconds"], 3)
    count = {status: sum(1 for r in rows if r["status"] == status)
             for status in ("baked", "skipped", "failed", "not started")}
    baked = [j.result for j in plan.jobs if j.status == "baked"]
    return {
        "thickbake_version": __version__,
        "source": str(plan.src),
        "output": str(plan.out),
        "rules_file": str(plan.rules.path.resolve()) if plan.rules.path else None,
        "started": started_at.isoformat(timespec="seconds"),
        "finished": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "seconds": round(seconds, 3),
        "cores": cores,
        "jobs": jobs,
        "threads_per_bake": threads,
        "cluster": cluster,
        "forced": force,
        "interrupted": interrupted,
        "totals": {
            "assets": len(rows),
            "baked": count["baked"],
            "skipped": count["skipped"],
            "failed": count["failed"],
            "not_started": count["not started"],
            "rays_traced": sum(int(m["data"].get("rays_traced", 0)) for r in baked for m in r.maps),
            "bake_seconds": round(sum(float(m["data"].get("seconds", 0.0)) for r in baked for m in r.maps), 3),
            "maps": sum(len(r["maps"]) for r in rows),
            "warnings": sum(len(r["warnings"]) for r in rows),
            **({"preview_seconds": round(sum(v["seconds"] for v in previews.values()), 3)} if previews else {}),
        },
        "assets": rows,
    }


def _report_row(job) -> dict:
    """One asset in ``report.json``: its status, figures (from its first sidecar) and every map."""
    asset, result = job.asset, job.result
    side = result.sidecar if job.status in ("baked", "skipped") and result.sidecar else {}
    maps = [_map_row(m) for m in result.maps] if job.status in ("baked", "skipped") else []
    # warnings come from the sidecars, so a skipped asset keeps those of the bake that made its maps
    asset_warnings = list((side.get("mesh") or {}).get("warnings", []))
    warnings = asset_warnings + [f"{PurePosixPath(m['map']).name}: {w}" for m in maps for w in m["warnings"]]
    if not maps:
        warnings = list(result.warnings or [])
    row = {
        "source": asset.rel,
        "map": maps[0]["map"] if maps else asset.map_rel,
        "sidecar": maps[0]["sidecar"] if maps else asset.sidecar_rel,
        "maps": maps,
        "status": job.status,
        "reason": job.reason,
        "error": result.error,
        "failure_kind": result.failure_kind,
        "seconds": side.get("seconds"),
        "rays_traced": sum(m["rays_traced"] or 0 for m in maps) if maps else None,
        "rays_per_second": side.get("rays_per_second"),
        "coverage": side.get("coverage"),
        "stats": side.get("stats"),
        "size": side.get("size"),
        "measure": side.get("measure"),
        "settings_hash": side.get("settings_hash"),
        "requested_settings_hash": asset.requested_hash,
        "inputs_sha256": asset.inputs_sha256,
        "settings": asset.options.settings,
        "format": asset.options.format,
        "rules": list(asset.options.rules),
        "worker_seconds": result.worker_seconds,
        "threads": result.threads,
        "worker": result.worker,
        "asset_warnings": asset_warnings,
        "warnings": warnings,
    }
    if result.traceback:
        row["traceback"] = result.traceback
    return row


def _map_row(item: dict) -> dict:
    """One map of an asset in ``report.json``: where it is, what it holds, its figures and warnings."""
    from thickbake.maps.sidecar import read_map_of

    data = item["data"]
    map_of = read_map_of(data, item["sidecar"])  # checked already: written by this batch or parsed to skip
    return {"map": item["map"], "sidecar": item["sidecar"], "map_of": map_of and map_of.to_dict(),
            "coverage": data.get("coverage"), "stats": data.get("stats"), "size": data.get("size"),
            "measure": data.get("measure"), "seconds": data.get("seconds"), "rays_traced": data.get("rays_traced"),
            "rays_per_second": data.get("rays_per_second"), "escape_fraction": data.get("escape_fraction"),
            "warnings": list(data.get("warnings") or [])}


def batch_thumbnails(plan) -> dict[str, bytes]:
    """Thumbnail per map (by its path relative to OUT): from the bake, or read from disk when skipped."""
    thumbs = {}
    for job in plan.jobs:
        for item in job.result.maps if job.status in ("baked", "skipped") else []:
            picture = item.get("thumbnail") or thumbnail_from_file(plan.out / item["map"])
            if picture:
                thumbs[item["map"]] = picture
    return thumbs


# ---------------------------------------------------------------------------- HTML
_CSS = """
body{font:14px/1.4 system-ui,-apple-system,"Segoe UI",sans-serif;margin:24px;color:#222;background:#fafafa}
h1{font-size:20px;margin:0 0 4px}h2{font-size:16px;margin:24px 0 8px}
.totals{color:#555;margin:0 0 16px}.totals b{color:#222}
.failures{list-style:none;padding:0;margin:0}
.failures li{background:#fdecea;border-left:4px solid #c62828;padding:6px 10px;margin:4px 0;font-family:ui-monospace,monospace;font-size:12px;word-break:break-word}
.sheet{display:grid;grid-template-columns:repeat(auto-fill,minmax(180px,1fr));gap:12px}
.card{background:#fff;border:1px solid #ddd;border-radius:6px;padding:8px;margin:0}
.card.failed{border-color:#c62828}.card.skipped{opacity:.85}
.card img,.card .empty{display:block;width:128px;height:128px;margin:0 auto 6px;object-fit:contain;image-rendering:pixelated;background:#000}
.card .empty{background:repeating-linear-gradient(45deg,#eee,#eee 6px,#f8f8f8 6px,#f8f8f8 12px);color:#999;text-align:center;line-height:128px;font-size:12px}
.card figcaption{font-size:12px}.name{font-weight:600;word-break:break-all}
.badge{display:inline-block;font-size:11px;padding:0 6px;border-radius:8px;color:#fff;margin-left:4px}
.badge.baked{background:#2e7d32}.badge.skipped{background:#757575}.badge.failed{background:#c62828}.badge.not-started{background:#ef6c00}
dl{display:grid;grid-template-columns:auto 1fr;gap:0 8px;margin:4px 0 0}dt{color:#777}dd{margin:0;font-variant-numeric:tabular-nums}
.warnings{margin:4px 0 0;padding-left:14px;color:#8a5a00;font-size:11px}.warnings li{word-break:break-word}
.card img.still{background:#101418;image-rendering:auto}.card .viewer{display:block;text-align:center;font-size:12px;margin:0 0 6px}
.error{color:#c62828;font-family:ui-monospace,monospace;font-size:11px;word-break:break-word}
"""


def render_html(report: dict, thumbnails: dict[str, bytes], stills: dict[str, bytes | None] | None = None) -> str:
    """The contact sheet as one HTML string (no external resources)."""
    esc = html.escape
    totals = report["totals"]
    rows = sorted(report["assets"], key=lambda r: (STATUS_ORDER.get(r["status"], 9), r["source"]))
    failed = [r for r in rows if r["status"] == "failed"]
    parts = [
        "<!doctype html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>thickbake batch report: {esc(report['source'])}</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<h1>Thickness maps of {esc(report['source'])}</h1>",
        '<p class="totals">'
        f"<b>{totals['assets']}</b> assets: <b>{totals['baked']}</b> baked, "
        f"<b>{totals['skipped']}</b> skipped (up to date), "
        f"<b>{totals['failed']}</b> failed"
        + (f", <b>{totals.get('maps', 0)}</b> maps" if totals.get("maps") else "")
        + (f", <b>{totals['warnings']}</b> warnings" if totals.get("warnings") else "")
        + (f", <b>{totals['not_started']}</b> not started (interrupted)" if totals.get("not_started") else "")
        + (f" · {report['jobs']} job{'s' if report['jobs'] != 1 else ''} × {_threads_text(report['threads_per_bake'])}"
           if report["jobs"] else " · nothing to bake")
        + f" · {report['seconds']:.1f} s · {_rays_text(totals.get('rays_traced', 0))} traced"
        + (f" · cluster {esc(report['cluster'])}" if report.get("cluster") else "")
        + f" · thickbake {esc(report['thickbake_version'])} · {esc(report['finished'])}</p>",
        '<p class="totals">Thumbnails are scaled per map (black 0, white its brightest texels); '
        "min/mean/max are in scene units for thickness, unitless otherwise.</p>",
    ]
    if failed:
        parts.append(f"<h2>Failed ({len(failed)})</h2><ul class=\"failures\">")
        for row in failed:
            parts.append(f"<li><b>{esc(row['source'])}</b>: {esc(row.get('error') or 'unknown error')}</li>")
        parts.append("</ul>")
    parts.append("<h2>Maps</h2><div class=\"sheet\">")
    for row in rows:
        still = (stills or {}).get(row["source"])
        if row.get("maps"):
            for i, item in enumerate(row["maps"]):
                parts.append(_card(_map_card_row(row, item), thumbnails.get(item["map"]), still if i == 0 else None))
        else:
            parts.append(_card(row, thumbnails.get(row["map"]), still))
    parts.append("</div></body></html>\n")
    return "\n".join(parts)


def _map_card_row(row: dict, item: dict) -> dict:
    """The card of one map: the asset's status and settings, the map's own figures and warnings."""
    card = dict(row, **{k: item[k] for k in ("map", "coverage", "stats", "size", "measure", "seconds",
                                             "rays_per_second")})
    card["map_of"] = item.get("map_of")
    card["warnings"] = list(row.get("asset_warnings") or []) + list(item.get("warnings") or [])
    return card


def _card(row: dict, thumbnail: bytes | None, still: bytes | None = None) -> str:
    esc = html.escape
    status = row["status"]
    css = status.replace(" ", "-")
    if thumbnail:
        data = base64.b64encode(thumbnail).decode("ascii")
        picture = f'<img alt="{esc(row["map"])}" src="data:image/png;base64,{data}">'
    else:
        picture = '<div class="empty">no map</div>'
    if still:
        data = base64.b64encode(still).decode("ascii")
        picture += f'<img class="still" alt="lit from behind" title="lit from behind" src="data:image/png;base64,{data}">'
    if row.get("viewer"):
        picture += f'<a class="viewer" href="{esc(row["viewer"])}">open the back-lit viewer</a>'
    figures = []
    if row.get("size"):
        figures.append(("size", f"{row['size'][0]}×{row['size'][1]}"))
    if row.get("coverage") is not None:
        figures.append(("coverage", f"{row['coverage']:.1%}"))
    stats = row.get("stats")
    if stats:
        figures.append(("measure", row.get("measure") or "?"))
        figures.append(("min/mean/max", f"{stats['min']:.3g} / {stats['mean']:.3g} / {stats['max']:.3g}"))
    if row.get("seconds") is not None:
        figures.append(("bake", f"{row['seconds']:.2f} s"))
    if row.get("rays_per_second"):
        figures.append(("rays/s", f"{row['rays_per_second'] / 1e6:.2f} M"))
    if row.get("settings_hash"):
        figures.append(("settings", row["settings_hash"][:8]))
    of = row.get("map_of") or {}
    if of.get("material") is not None or of.get("tile") is not None or of.get("uv_set"):
        figures.insert(0, ("map of", " · ".join(x for x in (
            f"material {of['material']}" if of.get("material") is not None else "",
            f"UV set {of['uv_set']}" if of.get("uv_set") else "",
            f"tile {of['tile']}" if of.get("tile") is not None else "") if x)))
    dl = "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in figures)
    warns = "".join(f'<li>{esc(w)}</li>' for w in row.get("warnings") or [])
    if warns:
        warns = f'<ul class="warnings">{warns}</ul>'

    error = f'<div class="error">{esc(row["error"])}</div>' if row.get("error") else ""
    note = f'<div class="error">{esc(row["reason"])}</div>' if status == "not started" and row.get("reason") else ""
    return (f'<figure class="card {css}">{picture}<figcaption><span class="name">{esc(row["source"])}</span>'
            f'<span class="badge {css}">{esc(status)}</span>{error}{note}<dl>{dl}</dl>{warns}</figcaption></figure>')


def _threads_text(threads) -> str:
    if threads is None:
        return "threads chosen per worker"
    return f"{threads} thread{'s' if threads != 1 else ''} per bake"


def _rays_text(rays: int) -> str:
    return f"{rays / 1e6:.1f}M rays" if rays >= 1e5 else f"{rays:,} rays"


__all__ = ["build_report", "batch_thumbnails", "thumbnail_png", "thumbnail_from_file", "write_reports", "render_html",
           "REPORT_JSON", "REPORT_HTML", "THUMBNAIL_SIDE"]
