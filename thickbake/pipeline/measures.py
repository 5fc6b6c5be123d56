"""Measure stage: per-ray values and their per-sample running moments.

What each measure records per ray (thickness, transmittance, occlusion) is defined by its object in
:mod:`thickbake.measures`; this stage applies it to traced chords and reduces the values.

The texel value is the mean of its samples' means; its standard error comes from each sample's
sample variance (the independent-sampling formula, which over-estimates the error of a
low-discrepancy set, so it is conservative).
"""

from __future__ import annotations

import numpy as np

from thickbake.measures import Measure, measure_named


def ray_values(chord: np.ndarray, hit: np.ndarray, measure: str | Measure, reach: float,
               attenuation_distance: float | None) -> np.ndarray:
    """(n, k) float64 per-ray values of a measure: :meth:`thickbake.measures.Measure.ray_values`.

    Parameters
    ----------
    chord : (n, k) float32
        Chord length from the surface point, scene units (already bias-corrected).
    hit : (n, k) bool
        Whether the ray hit the mesh within reach.
    measure : Measure or its name
    reach : float
        Scene units.
    attenuation_distance : float or None
        Scene units; needed for ``transmittance``.
    """
    return measure_named(measure).ray_values(chord, hit, reach, attenuation_distance)


class Moments:
    """Running count, sum and sum of squares of ray values for n samples (float64)."""

    def __init__(self, n: int):
        self.count = np.zeros(n, np.int64)
        self.total = np.zeros(n, np.float64)
        self.total_sq = np.zeros(n, np.float64)

    def add(self, index: np.ndarray, values: np.ndarray) -> None:
        """Add (m, k) ray values to samples ``index`` (m,)."""
        self.count[index] += values.shape[1]
        self.total[index] += values.sum(axis=1)
        self.total_sq[index] += np.square(values).sum(axis=1)

    def mean(self) -> np.ndarray:
        return self.total / np.maximum(self.count, 1)

    def stderr(self) -> np.ndarray:
        """(n,) standard error of each sample's mean (unbiased variance; 0 for one ray)."""
        n = np.maximum(self.count, 1)
        mean = self.total / n
        var = np.maximum(self.total_sq / n - mean * mean, 0.0) * n / np.maximum(n - 1, 1)
        return np.sqrt(var / n)


def texel_reduce(texel: np.ndarray, sample_mean: np.ndarray, sample_stderr: np.ndarray,
                 sample_area: np.ndarray, sample_rays: np.ndarray):
    """Combine sample statistics into texel statistics.

    Parameters
    ----------
    texel : (n,) int64
        Texel of each sample (any order).
    sample_mean, sample_stderr, sample_area : (n,) float64
    sample_rays : (n,) int64
        Rays traced per sample.

    Returns
    -------
    texels : (t,) int64
        Distinct texels.
    mean : (t,) float64
        Mean of the texel's sample means.
    stderr : (t,) float64
        sqrt(Σ se²) / S, the standard error of that mean (samples independent).
    area : (t,) float64
        World area the texel represents, scene units².
    claims : (t,) int64
        Samples per texel.
    rays : (t,) int64
        Rays traced per texel.
    """
    texels, inverse, claims = np.unique(texel, return_inverse=True, return_counts=True)
    s = claims.astype(np.float64)
    mean = np.bincount(inverse, weights=sample_mean, minlength=len(texels)) / s
    stderr = np.sqrt(np.bincount(inverse, weights=sample_stderr ** 2, minlength=len(texels))) / s
    area = np.bincount(inverse, weights=sample_area, minlength=len(texels))
    rays = np.bincount(inverse, weights=sample_rays, minlength=len(texels)).astype(np.int64)
    return texels, mean, stderr, area, claims, rays
