"""Compare two baked maps in measure units, through their sidecars.

``thickbake compare A B [-o DIFF.png] [--tolerance T] [--max-share F]``

Each map is decoded with the formula its sidecar records (``measure = offset + scale · code /
code_max`` for a PNG, the stored float for a TIFF), so maps of different bit depth, reach, inversion
or file type compare in scene units (thickness) or as plain fractions (transmittance, occlusion).
The two maps must have the same size and the same measure.

Which texels are compared
-------------------------
A sidecar records the share of covered texels but not the mask, and seam padding makes the texels
around every island non-empty, so the covered texels cannot be told apart from the padding in the
image alone.  The rule used here: **compare every texel that is non-empty (decoded value ≠ 0) in at
least one of the two maps.**  A texel empty in both holds 0 in both (uncovered texels are baked as 0,
and an inverted PNG decodes them back to 0), so leaving it out only drops differences that are exactly
zero; it keeps the empty background from diluting the RMSE and the share beyond tolerance.  The
compared set is therefore the islands plus their padding ring (padding copies island values, which is
what a renderer filtering the texture reads).  A covered texel whose measure is exactly 0 in both maps
is dropped too, again with a zero difference.

Figures
-------
* RMSE and largest absolute difference over the compared texels, in measure units.
* PSNR = 20·log10(peak / RMSE) dB with peak = the larger full-scale range of the two maps: the reach
  for thickness (a PNG's ``|scale|``; a TIFF's sidecar ``reach``), 1 for transmittance and occlusion.
* Share of compared texels with |A − B| > tolerance.  Default tolerance: one 8-bit code step of the
  coarser map, ``peak / 255`` (reach/255 for thickness) — the smallest difference an 8-bit texture
  can show.
* Exit status 1 when that share exceeds ``--max-share`` (default 0), else 0.

The difference image (``-o DIFF.png``) shows A − B texel by texel: white = equal, blue = A < B,
red = A > B, saturating at ±max(largest difference, tolerance); texels empty in both maps are dark
grey.  A strip under the map carries the colour scale and its end values in measure units.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from thickbake.errors import ThickbakeError
from thickbake.measures import measure_named

#: Colour of A < B (blue) and A > B (red) at full saturation, and of texels empty in both maps.
COLOUR_A_BELOW = np.array([33, 102, 172], np.float64)
COLOUR_A_ABOVE = np.array([178, 24, 43], np.float64)
COLOUR_EMPTY = np.array([64, 64, 64], np.uint8)
#: Height of the legend strip in pixels and the smallest canvas width that fits its labels.
LEGEND_HEIGHT = 36
LEGEND_MIN_WIDTH = 320


@dataclass
class DecodedMap:
    """A map decoded to measure units.

    Attributes
    ----------
    path : Path
    values : (h, w) float64
        Measure per texel (scene units for thickness, unitless otherwise), padding included.
    measure : str
    reach : float or None
        Scene units, from the sidecar.
    span : float
        Full-scale range in measure units (reach for thickness, 1 otherwise).
    step : float
        One code step in measure units (0 for a float TIFF).
    kind : str
        "8-bit PNG", "16-bit PNG" or "float TIFF".
    coverage : float or None
        Share of covered texels, from the sidecar.
    """

    path: Path
    values: np.ndarray
    measure: str
    reach: float | None
    span: float
    step: float
    kind: str
    coverage: float | None


@dataclass
class Comparison:
    """Result of :func:`compare_maps` (all differences are A − B, in measure units)."""

    a: DecodedMap
    b: DecodedMap
    difference: np.ndarray      # (h, w) float64, 0 outside the compared texels
    compared: np.ndarray        # (h, w) bool
    rmse: float
    max_abs: float
    peak: float
    psnr: float                 # dB; inf when the maps are equal
    tolerance: float
    tolerance_source: str
    beyond: int                 # compared texels with |A − B| > tolerance
    a_above: int                # of those, A > B
    a_below: int

    @property
    def count(self) -> int:
        return int(self.compared.sum())

    @property
    def share_beyond(self) -> float:
        return self.beyond / self.count if self.count else 0.0

    def to_dict(self) -> dict:
        """The figures as plain JSON-able values (measure units; PSNR in dB, null when the maps are equal)."""
        def described(m: DecodedMap) -> dict:
            return {"path": str(m.path), "measure": m.measure, "reach": m.reach, "span": m.span, "step": m.step,
                    "kind": m.kind, "coverage": m.coverage}

        return {"a": described(self.a), "b": described(self.b), "texels_compared": self.count,
                "rmse": self.rmse, "max_abs": self.max_abs, "peak": self.peak,
                "psnr_db": None if math.isinf(self.psnr) else self.psnr, "tolerance": self.tolerance,
                "tolerance_source": self.tolerance_source, "beyond": self.beyond, "a_above": self.a_above,
                "a_below": self.a_below, "share_beyond": self.share_beyond}


def load_map(path: str | os.PathLike) -> DecodedMap:
    """Read a map and its sidecar (:func:`thickbake.maps.sidecar.read_sidecar`) and decode it to measure units.

    Raises
    ------
    ThickbakeError
        Missing files, a sidecar without a valid encoding, or an image that does not match it.
    """
    from thickbake.inputs import check_regular_file
    from thickbake.maps.files import read_image
    from thickbake.maps.sidecar import read_sidecar

    path = Path(path)
    if not path.exists():
        raise ThickbakeError("no such file", path=path, fix="check the path")
    if path.is_dir() or path.suffix.lower() not in (".png", ".tif", ".tiff"):
        raise ThickbakeError("is not a map (a .png or .tif written by 'thickbake bake')", path=path,
                             fix="compare two maps, e.g. thickbake compare old.png new.png")
    check_regular_file(path, what="map")
    side = read_sidecar(path)
    side.check_map(path)
    image = read_image(path)
    if image.ndim != 2:
        raise ThickbakeError(f"the image has {image.shape[2] if image.ndim == 3 else '?'} channels, not one",
                             path=path, fix="compare the single-channel map as written by 'thickbake bake'")
    enc = side.encoding
    values = enc.decode(image, path)
    span = side.full_scale if enc.code_max is None else abs(enc.scale)
    return DecodedMap(path, values, side.measure.name, side.reach, span, enc.step, enc.kind, side.coverage)


def compare_maps(a: DecodedMap, b: DecodedMap, tolerance: float | None = None) -> Comparison:
    """Texel-by-texel comparison of two decoded maps (see the module docstring for the rules).

    Parameters
    ----------
    a, b : DecodedMap
        Same size and measure.
    tolerance : float, optional
        Largest allowed |A − B| in measure units; default one 8-bit step of the coarser map.
    """
    if a.values.shape != b.values.shape:
        ha, wa = a.values.shape
        hb, wb = b.values.shape
        raise ThickbakeError(f"the maps differ in size: {a.path.name} is {wa}x{ha}, {b.path.name} is {wb}x{hb}",
                             path=b.path, fix="bake both with the same --size")
    if a.measure != b.measure:
        raise ThickbakeError(f"the maps hold different measures: {a.path.name} is {a.measure}, "
                             f"{b.path.name} is {b.measure}", path=b.path,
                             fix="compare maps baked with the same --measure")
    peak = max(a.span, b.span)
    if tolerance is None:
        tolerance = peak / 255.0
        source = "one 8-bit step of the coarser map (full scale / 255)"
    else:
        if not (tolerance >= 0 and math.isfinite(tolerance)):
            raise ThickbakeError(f"tolerance {tolerance!r} must be a number ≥ 0", fix="e.g. --tolerance 0.01")
        source = "given"
    compared = (a.values != 0) | (b.values != 0)
    diff = np.where(compared, a.values - b.values, 0.0)
    d = diff[compared]
    if d.size:
        rmse = float(np.sqrt(np.mean(d * d)))
        max_abs = float(np.abs(d).max())
    else:
        rmse = max_abs = 0.0
    psnr = math.inf if rmse == 0 else 20.0 * math.log10(peak / rmse)
    over = np.abs(d) > tolerance
    return Comparison(a=a, b=b, difference=diff, compared=compared, rmse=rmse, max_abs=max_abs, peak=peak,
                      psnr=psnr, tolerance=float(tolerance), tolerance_source=source, beyond=int(over.sum()),
                      a_above=int((over & (d > 0)).sum()), a_below=int((over & (d < 0)).sum()))


# ---------------------------------------------------------------------------- difference image
def difference_rgb(difference: np.ndarray, compared: np.ndarray, limit: float) -> np.ndarray:
    """Signed difference → (h, w, 3) uint8 diverging colours.

    Parameters
    ----------
    difference : (h, w) float
        A − B, measure units.
    compared : (h, w) bool
        Texels to colour; the others are dark grey.
    limit : float
        |A − B| at which the colour saturates (> 0).
    """
    t = np.clip(difference / limit, -1.0, 1.0)[..., None]
    white = np.full(3, 255.0)
    end = np.where(t < 0, COLOUR_A_BELOW, COLOUR_A_ABOVE)
    rgb = white + (end - white) * np.abs(t)
    out = np.rint(rgb).astype(np.uint8)
    out[~compared] = COLOUR_EMPTY
    return out


def _legend_strip(width: int, limit: float, units: str) -> np.ndarray:
    """(LEGEND_HEIGHT, width, 3) uint8: a colour bar from −limit to +limit with its labels."""
    from PIL import Image, ImageDraw, ImageFont

    margin = 8
    bar = np.linspace(-limit, limit, max(width - 2 * margin, 2))[None, :].repeat(10, axis=0)
    strip = Image.new("RGB", (width, LEGEND_HEIGHT), tuple(int(c) for c in COLOUR_EMPTY))
    strip.paste(Image.fromarray(difference_rgb(bar, np.ones(bar.shape, bool), limit)), (margin, 4))
    draw = ImageDraw.Draw(strip)
    font = ImageFont.load_default()
    suffix = f" {units}" if units else ""
    labels = [(f"A<B  -{limit:.3g}", "left"), (f"0{suffix}", "centre"), (f"+{limit:.3g}  A>B", "right")]
    y = 18
    for text, where in labels:
        box = draw.textbbox((0, 0), text, font=font)
        text_width = box[2] - box[0]
        x = {"left": margin, "centre": (width - text_width) // 2, "right": width - margin - text_width}[where]
        draw.text((x, y), text, fill=(235, 235, 235), font=font)
    return np.asarray(strip)


def difference_image_bytes(comparison: Comparison) -> bytes:
    """PNG bytes of the signed difference map with its legend strip."""
    import io

    from PIL import Image

    limit = max(comparison.max_abs, comparison.tolerance)
    if not limit > 0:
        limit = comparison.peak / 255.0
    rgb = difference_rgb(comparison.difference, comparison.compared, limit)
    h, w = rgb.shape[:2]
    width = max(w, LEGEND_MIN_WIDTH)
    canvas = np.empty((h + LEGEND_HEIGHT, width, 3), np.uint8)
    canvas[:] = COLOUR_EMPTY
    canvas[:h, :w] = rgb
    units = measure_named(comparison.a.measure).unit_label
    canvas[h:] = _legend_strip(width, limit, units)
    buffer = io.BytesIO()
    Image.fromarray(canvas).save(buffer, format="PNG")
    return buffer.getvalue()


# ---------------------------------------------------------------------------- report
def _describe(m: DecodedMap) -> str:
    reach = f", reach {m.reach:.6g}" if m.reach else ""
    step = f", code step {m.step:.3g}" if m.step else ""
    covered = f", {m.coverage:.1%} of texels covered (sidecar)" if isinstance(m.coverage, (int, float)) else ""
    return f"{m.path.name}: {m.kind}{reach}{step}{covered}"


def format_report(c: Comparison, max_share: float) -> list[str]:
    """Lines of the plain-text report."""
    label = measure_named(c.a.measure).unit_label
    units = f" {label}" if label else ""
    h, w = c.a.values.shape
    total = h * w
    psnr = "inf (identical)" if math.isinf(c.psnr) else f"{c.psnr:.2f} dB"
    verdict = "PASS" if c.share_beyond <= max_share else "FAIL"
    return [
        f"compare {c.a.path.name} with {c.b.path.name} ({c.a.measure}{',' if units else ''}{units})",
        f"  A  {_describe(c.a)}",
        f"  B  {_describe(c.b)}",
        f"  texels compared       {c.count:,} of {w}x{h} ({c.count / total:.1%}): non-empty in A or B",
        f"  RMSE                  {c.rmse:.4g}{units}",
        f"  largest |A - B|       {c.max_abs:.4g}{units}",
        f"  PSNR                  {psnr} (peak {c.peak:.6g}{units}, the larger full-scale range)",
        f"  tolerance             {c.tolerance:.4g}{units} ({c.tolerance_source})",
        f"  beyond tolerance      {c.share_beyond:.3%} ({c.beyond:,} texels: {c.a_above:,} with A > B, "
        f"{c.a_below:,} with A < B)",
        f"  result                {verdict}: share beyond tolerance {c.share_beyond:.3%} "
        f"{'≤' if verdict == 'PASS' else '>'} allowed {max_share:.3%}",
    ]


__all__ = ["DecodedMap", "Comparison", "load_map", "compare_maps", "difference_rgb", "difference_image_bytes",
           "format_report"]
