"""The viewer page: one self-contained HTML file with the asset, its maps and three.js inside.

The page needs no network at view time: three.js (vendored in ``vendor/``, MIT licence kept there and
quoted in the page) and every array travel gzip-compressed and base64-encoded inside ``<script>``
blocks, and the browser unpacks them with its built-in ``DecompressionStream``.  The shading is our
own code in ``viewer.js`` (a back-light term with a Henyey–Greenstein lobe; see there).  Same inputs → byte-identical page.
"""

from __future__ import annotations

import base64
import gzip
import html
import json
import os
from dataclasses import dataclass, field, replace
from functools import lru_cache
from pathlib import Path
from typing import Callable

import numpy as np

from thickbake.errors import ThickbakeError
from thickbake.preview.scene import MapEntry, entries_of, entry_faces

VENDOR = Path(__file__).parent / "vendor"
#: The three.js release vendored in ``vendor/`` (npm package ``three``; the same pin as the browser tests).
THREE_VERSION = "0.187.0"
VIEWER_JS = Path(__file__).parent / "viewer.js"
#: gzip level of the embedded arrays: 6 is zlib's default balance of size and time.
GZIP_LEVEL = 6


@dataclass(frozen=True)
class ViewSettings:
    """The term's parameters and the first view (all overridable in the page and in its URL).

    forward : float
        Henyey–Greenstein asymmetry g in [0, 0.95] of the light leaving the body (Henyey & Greenstein,
        ApJ 93:70, 1941): 0 glows the same from every side, towards 1 only along the light's path.
    strength : float
        Scale of the glow (1: a texel that lets all light through, seen along the light's path, is as
        bright as a face lit head-on).  The defaults are a soft, wide glow (viewing defaults, no
        published source).
    fill : float
        A dim light from the eye, so that thick parts are not black (0 = back light only).
    attenuation : float or None
        Scene units: a thickness d passes exp(−d / attenuation) of the light.  None: a quarter of the
        median thickness of the maps' covered texels (a viewing default, no published source), so
        that thin parts glow and the bulk does not.  A measured medium's σ_tr replaces it.
    az, el : float
        Camera direction from the asset's centre, degrees (az about +y from +z, el up from the
        horizon).  The light starts straight behind the asset, opposite the camera.
    albedo : (3,) float
        Diffuse albedo, linear RGB.
    """

    forward: float = 0.3
    strength: float = 1.0
    fill: float = 0.06
    attenuation: float | None = None
    az: float = 30.0
    el: float = 20.0
    albedo: tuple = (0.95, 0.85, 0.70)
    background: str = "#101418"
    fov_deg: float = 35.0

    def hash_params(self) -> str:
        """The URL fragment that reproduces these settings in the page."""
        values = {"forward": self.forward, "strength": self.strength, "fill": self.fill, "az": self.az, "el": self.el}
        if self.attenuation is not None:
            values["attenuation"] = self.attenuation
        return "&".join(f"{k}={v:.9g}" for k, v in values.items())


@dataclass
class Preview:
    """A written (or ready to write) viewer page and what it holds."""

    html: str
    entries: list[MapEntry]
    settings: ViewSettings
    asset_name: str
    faces: int
    faces_covered: int
    warnings: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        return {"asset": self.asset_name, "faces": self.faces, "faces_covered": self.faces_covered,
                "maps": [{"label": e.label, "map": str(e.path), "measure": e.measure, "kind": e.kind,
                          "uv_set": e.uv_set, "material": e.material, "tile": e.tile} for e in self.entries],
                "attenuation": self.settings.attenuation, "bytes": len(self.html.encode()),
                "warnings": list(self.warnings)}


def build_preview(asset_source, maps, settings: ViewSettings | None = None,
                  progress: Callable[[str], None] | None = None) -> Preview:
    """Load the asset and the maps, match each map to its faces and build the page.

    Parameters
    ----------
    asset_source : str, os.PathLike or an already loaded Asset
    maps : sequence of str or os.PathLike
        Maps or their sidecars (each may hold several entries: a packed image).
    settings : ViewSettings, optional
    progress : callable, optional
        Called with a short text at each step.

    Raises
    ------
    ThickbakeError
        Missing files, sidecars that do not decode, maps that cover no face of the asset.
    """
    from thickbake.pipeline.load import load_asset

    say = progress or (lambda text: None)
    settings = settings or ViewSettings()
    if not maps:
        raise ThickbakeError("no map to show", fix="give the asset's maps (or sidecars) after it, e.g. "
                             "thickbake preview candle.glb candle.thickness.png -o view.html")
    say("reading the asset")
    asset = asset_source if hasattr(asset_source, "triangles") else load_asset(asset_source)
    entries: list[MapEntry] = []
    for arg in maps:
        entries.extend(entries_of(arg))
    say(f"{len(entries)} map{'s' if len(entries) != 1 else ''}")
    faces, warnings = [], []
    seen: dict = {}
    for entry in entries:
        f = entry_faces(asset, entry, entry.map_of_given)
        if not len(f):
            raise ThickbakeError(f"the map covers no face of {asset.name} (material {entry.material}, UV set "
                                 f"{entry.uv_set}, tile {entry.tile})", path=entry.path,
                                 fix="give the maps baked from this asset")
        key = (entry.material, entry.uv_set, entry.tile)
        if key in seen:
            warnings.append(f"{entry.label} covers the same faces as {seen[key]}; shown hidden (tick it in the page)")
        seen.setdefault(key, entry.label)
        faces.append(f)
    if settings.attenuation is None:
        settings = replace(settings, attenuation=_default_attenuation(entries, asset.diagonal))
    covered = np.unique(np.concatenate(faces)) if faces else np.zeros(0, np.int64)
    say("writing the page")
    page = page_html(asset, entries, faces, [bool(w) for w in _hidden(entries)], settings)
    return Preview(html=page, entries=entries, settings=settings, asset_name=asset.name,
                   faces=int(len(asset.triangles)), faces_covered=int(len(covered)), warnings=warnings)


def _hidden(entries: list[MapEntry]) -> list[bool]:
    """Later entries over the same (material, UV set, tile) start hidden: one map per face is drawn."""
    seen, out = set(), []
    for e in entries:
        key = (e.material, e.uv_set, e.tile)
        out.append(key in seen)
        seen.add(key)
    return out


def _default_attenuation(entries: list[MapEntry], diagonal: float) -> float:
    """A quarter of the median covered thickness (scene units): thin parts glow, the bulk stays dark."""
    values = [e.decoded()[..., 0].ravel() for e in entries if e.kind == "thickness"]
    values = np.concatenate(values) if values else np.zeros(0)
    values = values[np.isfinite(values) & (values > 0)]
    median = float(np.median(values)) if values.size else 0.0
    return median / 4 if median > 0 else diagonal / 20


def _blob(array: np.ndarray, dtype: str) -> dict:
    data = np.ascontiguousarray(array, dtype=dtype).astype(np.dtype(dtype).newbyteorder("<"), copy=False)
    packed = gzip.compress(data.tobytes(), GZIP_LEVEL, mtime=0)
    return {"dtype": dtype, "data": base64.b64encode(packed).decode("ascii")}


def _texture(entry: MapEntry) -> dict:
    stored = entry.stored[::-1]  # bottom-up: row 0 = v 0, as texture coordinates run
    h, w, c = stored.shape
    dtype = {np.dtype(np.uint8): "uint8", np.dtype(np.uint16): "uint16"}.get(stored.dtype, "float32")
    return dict(_blob(stored, dtype), width=int(w), height=int(h), channels=int(c))


def page_data(asset, entries: list[MapEntry], faces: list[np.ndarray], hidden: list[bool],
              settings: ViewSettings) -> dict:
    """Everything the page's script reads, as JSON-able data."""
    uv_sets = [u for u in (getattr(asset, "uv_sets", None) or []) if u is not None] or [asset.triangle_uv]
    lo, hi = asset.bounds
    units = {e.units for e in entries if e.kind == "thickness"}
    return {
        "asset": {"name": asset.name, "bounds": [lo.tolist(), hi.tolist()], "faces": int(len(asset.triangles))},
        "geometry": {
            "positions": _blob(asset.triangles.reshape(-1), "float32"),
            "normals": _blob(asset.triangle_normals.reshape(-1), "float32"),
            "uv_sets": [_blob(np.asarray(u).reshape(-1), "float32") for u in uv_sets],
        },
        "entries": [{
            "label": e.label, "uv_set": e.uv_set, "tile_offset": list(e.tile_offset), "hidden": bool(h),
            "faces": _blob(f, "uint32"), "texture": _texture(e),
            "decode": {"kind": e.kind, "measure": e.measure, "offset": e.offset, "scale": e.scale,
                       "code_max": e.code_max, "sigma_per_unit": e.sigma_per_unit,
                       "show_range": list(e.show_range)},
        } for e, f, h in zip(entries, faces, hidden)],
        "defaults": {"forward": settings.forward, "strength": settings.strength, "fill": settings.fill,
                     "attenuation": settings.attenuation,
                     "az": settings.az, "el": settings.el},
        "albedo": list(settings.albedo), "background": settings.background, "fov_deg": settings.fov_deg,
        "units": ", ".join(sorted(units)) or "scene units",
    }


@lru_cache(maxsize=1)
def _three_blobs() -> tuple[str, str, str]:
    """(core, module) gzip+base64 and the licence text of the vendored three.js."""
    out = []
    for name in ("three.core.js", "three.module.js"):
        raw = (VENDOR / name).read_bytes()
        out.append(base64.b64encode(gzip.compress(raw, 9, mtime=0)).decode("ascii"))
    return out[0], out[1], (VENDOR / "LICENSE").read_text(encoding="utf-8")


def _script_json(data) -> str:
    """JSON safe inside a <script> element ('</' cannot end it early)."""
    return json.dumps(data, separators=(",", ":"), allow_nan=False).replace("</", "<\\/")


_CSS = """
html,body{margin:0;height:100%;background:#101418;color:#dde;font:13px/1.35 system-ui,sans-serif}
#view{position:fixed;inset:0 300px 0 0}#view canvas{display:block;width:100%;height:100%}
aside{position:fixed;top:0;right:0;bottom:0;width:284px;padding:8px;overflow:auto;background:#1a2028}
aside h1{font-size:14px;margin:0 0 6px;word-break:break-all}aside p{color:#99a;margin:4px 0 8px}
label{display:grid;grid-template-columns:1fr 90px 44px;gap:4px;align-items:center;margin:2px 0}
#entries label{display:block}output{font-variant-numeric:tabular-nums;text-align:right}
select,button{width:100%;margin:2px 0 6px}small{color:#778}
body.still aside{display:none}body.still #view{inset:0}
"""

_BOOT = """
const boot = JSON.parse(document.getElementById('thickbake-three').textContent);
const data = JSON.parse(document.getElementById('thickbake-data').textContent);
const unzip = async (b64) => {
  const bytes = Uint8Array.from(atob(b64), (c) => c.charCodeAt(0));
  return await new Response(new Blob([bytes]).stream().pipeThrough(new DecompressionStream('gzip'))).text();
};
const still = /(^#|&)still(&|$)/.test(location.hash);
if (still) document.body.classList.add('still');
try {
  const coreUrl = URL.createObjectURL(new Blob([await unzip(boot.core)], { type: 'text/javascript' }));
  const moduleText = (await unzip(boot.module)).split("'./three.core.js'").join(JSON.stringify(coreUrl));
  const THREE = await import(URL.createObjectURL(new Blob([moduleText], { type: 'text/javascript' })));
  await thickbakeViewer(THREE, data);
} catch (err) {
  window.thickbakeErrors.push('viewer failed: ' + (err && err.stack || err));
  document.getElementById('view').textContent = 'The viewer failed: ' + err;
  if (still) await fetch('/result', { method: 'POST', body: JSON.stringify({ png: null, errors: window.thickbakeErrors }) });
}
"""

_ERRORS = """
window.thickbakeErrors = [];
(() => {
  const original = console.error.bind(console);
  console.error = (...args) => { window.thickbakeErrors.push(args.map(String).join(' ')); original(...args); };
  window.addEventListener('error', (e) => window.thickbakeErrors.push('uncaught: ' + e.message));
  window.addEventListener('unhandledrejection', (e) => window.thickbakeErrors.push('unhandled: ' + e.reason));
})();
"""


def page_html(asset, entries: list[MapEntry], faces: list[np.ndarray], hidden: list[bool],
              settings: ViewSettings) -> str:
    """The whole page as one string."""
    from thickbake.version import __version__

    esc = html.escape
    core, module, licence = _three_blobs()
    viewer = VIEWER_JS.read_text(encoding="utf-8")
    assert "</script" not in viewer.lower()
    data = page_data(asset, entries, faces, hidden, settings)
    measures = sorted({e.measure for e in entries})
    return "\n".join([
        "<!doctype html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width,initial-scale=1">',
        f"<title>{esc(asset.name)}: back-lit preview (thickbake)</title>",
        f"<style>{_CSS}</style>",
        f"<script>{_ERRORS}</script>",
        "</head><body>",
        '<div id="view"></div>',
        "<aside>",
        f"<h1>{esc(asset.name)}</h1>",
        f"<p>{len(entries)} map{'s' if len(entries) != 1 else ''} ({esc(', '.join(measures))}), lit from behind: the light "
        "that crosses the body leaves it in a Henyey–Greenstein lobe, dimmed as each map says. Drag: camera. Shift- or right-drag: "
        "light. Wheel: distance.</p>",
        '<select id="mode"><option value="lit">lit view</option><option value="surface">map on the surface</option>'
        '<option value="uv">map in UV space</option></select>',
        '<button id="behind">light straight behind</button>',
        '<div id="controls"></div>',
        "<p>Map shown in UV space:</p><select id=\"entry\"></select>",
        '<p>Maps drawn:</p><div id="entries"></div>',
        f"<p><small>thickbake {esc(__version__)}; three.js {THREE_VERSION} (MIT licence, embedded below).</small></p>",
        "</aside>",
        f'<script type="application/json" id="thickbake-data">{_script_json(data)}</script>',
        f'<script type="application/json" id="thickbake-three">{_script_json({"core": core, "module": module})}</script>',
        f"<!-- three.js {THREE_VERSION} licence:\n{esc(licence).replace('--', '- -')}\n-->",
        f"<script>{viewer}</script>",
        f'<script type="module">{_BOOT}</script>',
        "</body></html>",
        "",
    ])


def write_preview(preview: Preview, out: str | os.PathLike) -> Path:
    """Write the page atomically."""
    from thickbake.maps.files import atomic_write_bytes

    return atomic_write_bytes(out, preview.html.encode("utf-8"))


def check_page_path(out: str | os.PathLike) -> Path:
    """Refuse an output that is not .html or is a folder, before any work."""
    out = Path(out)
    if out.suffix.lower() not in (".html", ".htm"):
        raise ThickbakeError("the viewer page must be an .html file", path=out, fix="name it e.g. view.html")
    if out.is_dir():
        raise ThickbakeError("the output is a folder", path=out, fix="give a file name such as view.html")
    return out


__all__ = ["ViewSettings", "Preview", "build_preview", "page_html", "page_data", "write_preview", "check_page_path",
           "THREE_VERSION"]
