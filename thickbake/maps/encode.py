"""Encode stage: measure values → normalised texture values → integer codes, and back.

Normalised value ``v`` in [0, 1] is the measure over its full scale
(:meth:`thickbake.measures.Measure.full_scale`): thickness / reach for thickness, the value itself
for the unitless transmittance and occlusion.

With ``invert`` the stored value is 1 − v (bright = thin for thickness).  An integer image stores
``code = round(v · (2^bits − 1))``.  Decoding is always linear and is written in the sidecar:
``measure = offset + scale · code / (2^bits − 1)``.
"""

from __future__ import annotations

import numpy as np

from thickbake.measures import Measure, measure_named


def decode_coefficients(measure: str | Measure, reach: float, invert: bool) -> tuple[float, float]:
    """(offset, scale) such that measure = offset + scale · v for a stored normalised value v."""
    span = measure_named(measure).full_scale(reach)
    return (span, -span) if invert else (0.0, span)


def normalise(values: np.ndarray, measure: str | Measure, reach: float, invert: bool) -> np.ndarray:
    """(h, w) measure values → (h, w) float64 stored values in [0, 1]."""
    offset, scale = decode_coefficients(measure, reach, invert)
    return np.clip((np.asarray(values, np.float64) - offset) / scale, 0.0, 1.0)


def quantise(stored: np.ndarray, bits: int) -> np.ndarray:
    """(h, w) stored values in [0, 1] → uint8 or uint16 codes, rounded to nearest."""
    top = (1 << bits) - 1
    dtype = np.uint16 if bits == 16 else np.uint8
    return np.rint(np.clip(stored, 0.0, 1.0) * top).astype(dtype)


def decode(codes: np.ndarray, offset: float, scale: float, bits: int) -> np.ndarray:
    """Integer codes → (h, w) float64 measure values (the sidecar's formula)."""
    return offset + scale * (np.asarray(codes, np.float64) / ((1 << bits) - 1))


def quantisation_step(measure: str | Measure, reach: float, bits: int) -> float:
    """One code step in measure units: |scale| / (2^bits − 1)."""
    _, scale = decode_coefficients(measure, reach, False)
    return abs(scale) / ((1 << bits) - 1)
