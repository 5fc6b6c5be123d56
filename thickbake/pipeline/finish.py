"""Steps after tracing that change how a map is stored, not what was measured.

* :func:`fit_reach` — ``reach = "fit"``: narrow a thickness map's encoded range to a high
  percentile of its texels, so a compact asset uses the whole code range instead of the bottom
  share of it (at the default reach, the bounding-box diagonal, the bundled candle's thickest texel
  sits at 42% of the range).
* :func:`medium_scale` — millimetres per scene unit for a ``medium`` bake, decided before tracing so
  a missing unit is refused before any work is done.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from thickbake.errors import ThickbakeError
from thickbake.media import GLTF_MM_PER_UNIT, get_medium, medium_info, parse_scene_unit
from thickbake.settings import FIT_PERCENTILE, BakeSettings


def fit_reach(values: np.ndarray, covered: np.ndarray, traced_reach: float,
              percentile: float = FIT_PERCENTILE) -> tuple[float, dict]:
    """The encoded reach for ``reach = "fit"`` and the sidecar's record of it.

    Parameters
    ----------
    values : (h, w) float32
        Thickness per texel, scene units (traced with ``traced_reach``).
    covered : (h, w) bool
    traced_reach : float
        The reach the rays were traced with, scene units.
    percentile : float
        Percentile of the covered texels' values that becomes the top code.

    Returns
    -------
    reach : float
        Scene units; at most ``traced_reach``.
    record : dict
        ``percentile``, ``reach``, ``traced_reach`` and ``texels_clipped`` (share of covered texels
        above the new reach, which the integer map stores as the top code).
    """
    vals = values[covered].astype(np.float64)
    reach = float(np.percentile(vals, percentile)) if vals.size else float(traced_reach)
    if not reach > 0:
        reach = float(traced_reach)  # an all-zero map: keep the traced range
    reach = min(reach, float(traced_reach))
    clipped = float((vals > reach).mean()) if vals.size else 0.0
    return reach, {"percentile": percentile, "reach": reach, "traced_reach": float(traced_reach),
                   "texels_clipped": clipped}


def with_reach(result, reach: float, record: dict | None = None):
    """A copy of a thickness bake encoded with another reach (the batch's shared reach of a group).

    The traced values are unchanged; the settings, the settings hash and the sidecar's reach follow
    the new reach, and ``record`` is kept in the sidecar as ``shared_reach``.
    """
    import dataclasses

    s = result.settings.replace(reach=float(reach))
    info = dict(result.info, reach=float(reach), settings=s.to_dict(), settings_hash=s.content_hash())
    if record is not None:
        info["shared_reach"] = record
    if "medium" in info:
        info["medium"] = medium_record(s, info["medium"]["mm_per_unit"])
    return dataclasses.replace(result, settings=s, info=info)


def medium_scale(settings: BakeSettings, source_path: str | None) -> float | None:
    """Millimetres per scene unit for a medium bake (None without a medium).

    ``scene_unit`` when given; otherwise 1 m for glTF files (glTF 2.0 §3.5.1: distances are in
    metres); other formats carry no unit, so the user must say it.
    """
    if settings.medium is None:
        return None
    if settings.scene_unit is not None:
        return parse_scene_unit(settings.scene_unit)
    if source_path is not None and Path(source_path).suffix.lower() in (".glb", ".gltf"):
        return GLTF_MM_PER_UNIT
    raise ThickbakeError("a medium needs the length of a scene unit, and this file format does not say it",
                         path=source_path, fix="give --scene-unit, e.g. 1cm, 1m or 25.4mm (glTF files are in metres)")


def medium_record(settings: BakeSettings, mm_per_unit: float) -> dict:
    """The sidecar's ``medium`` block."""
    return medium_info(get_medium(settings.medium), mm_per_unit)


__all__ = ["fit_reach", "with_reach", "medium_scale", "medium_record"]
