"""Measured scattering media: RGB transmittance through a baked thickness, and glTF attenuation fields.

The presets are the measured reduced scattering coefficients σs′ and absorption coefficients σa
(mm⁻¹, for red, green and blue) of the table of measured materials in

    H. W. Jensen, S. R. Marschner, M. Levoy and P. Hanrahan, "A Practical Model for Subsurface
    Light Transport", SIGGRAPH 2001 (Proceedings of ACM SIGGRAPH 2001, pp. 511–518).

The numbers in :data:`MEDIA` are transcribed from that table (as tabulated in the project's
REFERENCES.md); nothing else in this module is measured.  From diffusion theory (same paper) the
effective transport coefficient of each channel is

    σtr = √(3 σa (σa + σs′))                                   (mm⁻¹)

and a diffuse-transport estimate of the light that crosses a thickness d (mm) is

    T = exp(−σtr · d)                                          per channel.

With ``mm_per_unit`` millimetres per scene unit, a thickness of ``t`` scene units gives
``T = exp(−σtr · mm_per_unit · t)``.  glTF's KHR_materials_volume writes Beer's law as
``T(x) = attenuationColor^(x / attenuationDistance)`` (x in world units); choosing
``attenuationDistance = 1 / max(σtr · mm_per_unit)`` (the distance over which the most absorbed
channel falls to 1/e) and ``attenuationColor = exp(−σtr · mm_per_unit · attenuationDistance)`` makes
both formulas agree exactly for every thickness, with no colour channel rounding to 0.

These are optical approximations for shading: one measured sample of each material, under the
diffusion approximation, reduced to three wavelengths — not a measurement of the user's material.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from thickbake.errors import ThickbakeError

SOURCE = ('Jensen, Marschner, Levoy & Hanrahan, "A Practical Model for Subsurface Light Transport", '
          "SIGGRAPH 2001, table of measured materials")


@dataclass(frozen=True)
class Medium:
    """A measured material: σs′ and σa per channel (R, G, B), mm⁻¹."""

    name: str
    sigma_s_reduced: tuple[float, float, float]
    sigma_a: tuple[float, float, float]

    @property
    def sigma_tr(self) -> np.ndarray:
        """(3,) float64 effective transport coefficient √(3 σa (σa + σs′)), mm⁻¹."""
        sa = np.asarray(self.sigma_a, np.float64)
        ss = np.asarray(self.sigma_s_reduced, np.float64)
        return np.sqrt(3.0 * sa * (sa + ss))


# Transcribed from the table of measured materials of Jensen et al. 2001 (σs′ then σa, mm⁻¹, R G B).
MEDIA: dict[str, Medium] = {m.name.lower(): m for m in (
    Medium("Apple", (2.29, 2.39, 1.97), (0.0030, 0.0034, 0.046)),
    Medium("Chicken1", (0.15, 0.21, 0.38), (0.015, 0.077, 0.19)),
    Medium("Chicken2", (0.19, 0.25, 0.32), (0.018, 0.088, 0.20)),
    Medium("Cream", (7.38, 5.47, 3.15), (0.0002, 0.0028, 0.0163)),
    Medium("Ketchup", (0.18, 0.07, 0.03), (0.061, 0.97, 1.45)),
    Medium("Marble", (2.19, 2.62, 3.00), (0.0021, 0.0041, 0.0071)),
    Medium("Potato", (0.68, 0.70, 0.55), (0.0024, 0.0090, 0.12)),
    Medium("Skimmilk", (0.70, 1.22, 1.90), (0.0014, 0.0025, 0.0142)),
    Medium("Skin1", (0.74, 0.88, 1.01), (0.032, 0.17, 0.48)),
    Medium("Skin2", (1.09, 1.59, 1.79), (0.013, 0.070, 0.145)),
    Medium("Spectralon", (11.6, 20.4, 14.9), (0.0, 0.0, 0.0)),
    Medium("Wholemilk", (2.55, 3.21, 3.77), (0.0011, 0.0024, 0.014)),
)}

#: Millimetres per unit name accepted by ``--scene-unit``.
UNITS_MM = {"mm": 1.0, "cm": 10.0, "dm": 100.0, "m": 1000.0, "km": 1e6, "in": 25.4, "ft": 304.8, "yd": 914.4}
#: glTF 2.0 §3.5.1: "the units for all linear distances are meters".
GLTF_MM_PER_UNIT = 1000.0


def get_medium(name: str) -> Medium:
    """The preset called ``name`` (case-insensitive)."""
    try:
        return MEDIA[str(name).lower()]
    except KeyError:
        raise ThickbakeError(f"unknown medium {name!r}",
                             fix=f"use one of {', '.join(m.name for m in MEDIA.values())} ('--medium list' shows them)") from None


def parse_scene_unit(text: str | float) -> float:
    """Millimetres per scene unit from ``"1cm"``, ``"25.4mm"``, ``"1 m"``, ``"0.5in"`` (a bare number is mm)."""
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        value, unit = float(text), "mm"
    else:
        match = re.fullmatch(r"\s*([0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*([a-zA-Z]*)\s*", str(text))
        if not match:
            raise ThickbakeError(f"scene unit {text!r} is not a length", fix="give e.g. 1cm, 1m, 25.4mm or 1in")
        value, unit = float(match.group(1)), (match.group(2).lower() or "mm")
    if unit not in UNITS_MM:
        raise ThickbakeError(f"scene unit {text!r} has an unknown unit {unit!r}", fix=f"use one of {', '.join(UNITS_MM)}")
    mm = value * UNITS_MM[unit]
    if not (mm > 0 and math.isfinite(mm)):
        raise ThickbakeError(f"scene unit {text!r} must be a positive length", fix="give e.g. 1cm")
    return mm


def transmittance(thickness: np.ndarray, sigma_tr_per_mm: np.ndarray, mm_per_unit: float) -> np.ndarray:
    """RGB diffuse transmittance through a thickness.

    Parameters
    ----------
    thickness : (h, w) float
        Thickness in scene units.
    sigma_tr_per_mm : (3,) float
    mm_per_unit : float

    Returns
    -------
    (h, w, 3) float64 in [0, 1]: exp(−σtr · mm_per_unit · thickness) per channel.
    """
    t = np.asarray(thickness, np.float64)[..., None]
    return np.exp(-t * (np.asarray(sigma_tr_per_mm, np.float64) * float(mm_per_unit)))


def gltf_attenuation(sigma_tr_per_mm, mm_per_unit: float) -> tuple[list[float], float | None]:
    """(attenuationColor, attenuationDistance in world units) with color^(x/distance) = exp(−σtr·mm_per_unit·x).

    A medium that absorbs nothing (all σtr = 0) gives colour 1 and no distance (glTF's default +∞).
    """
    sigma = np.asarray(sigma_tr_per_mm, np.float64) * float(mm_per_unit)  # per scene unit
    top = float(sigma.max())
    if top <= 0:
        return [1.0, 1.0, 1.0], None
    distance = 1.0 / top
    return [float(c) for c in np.exp(-sigma * distance)], distance


def medium_info(medium: Medium, mm_per_unit: float) -> dict:
    """The sidecar's record of a medium bake."""
    color, distance = gltf_attenuation(medium.sigma_tr, mm_per_unit)
    return {"medium": medium.name, "source": SOURCE,
            "sigma_s_reduced_per_mm": list(medium.sigma_s_reduced), "sigma_a_per_mm": list(medium.sigma_a),
            "sigma_tr_per_mm": [float(x) for x in medium.sigma_tr], "mm_per_unit": float(mm_per_unit),
            "formula": "T_c = exp(-sigma_tr_c * mm_per_unit * thickness), thickness in scene units",
            "gltf_attenuation": {"attenuationColor": color, "attenuationDistance": distance}}


def preset_table() -> list[str]:
    """Lines listing every preset with its σs′, σa and σtr (for ``--medium list``)."""
    lines = [f"measured media (sigma in 1/mm, R G B), from {SOURCE}:",
             f"{'name':<11} {'sigma_s_reduced':<22} {'sigma_a':<24} sigma_tr"]
    for m in MEDIA.values():
        fmt = lambda v: " ".join(f"{x:g}" for x in v)  # noqa: E731
        lines.append(f"{m.name:<11} {fmt(m.sigma_s_reduced):<22} {fmt(m.sigma_a):<24} "
                     + " ".join(f"{x:.4g}" for x in m.sigma_tr))
    lines.append("optical approximations for shading (diffusion theory, one measured sample each), "
                 "not measurements of your material")
    return lines


__all__ = ["Medium", "MEDIA", "SOURCE", "get_medium", "parse_scene_unit", "transmittance", "gltf_attenuation",
           "medium_info", "preset_table", "GLTF_MM_PER_UNIT", "UNITS_MM"]
