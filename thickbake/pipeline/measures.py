"""Measure stage: per-ray values and their per-sample running moments.

What each measure records per ray (thickness, transmittance, occlusion) is defined by its object in
:mod:`thickbake.measures`; this stage applies it to traced chords and reduces the values.

Error estimate (randomised quasi-Monte Carlo)
---------------------------------------------
A sample's rays form R independent replicates (:mod:`thickbake.pipeline.directions`): R randomly
shifted copies of one scrambled Sobol net, each with n/R rays.  Each replicate mean is unbiased and
the R of them are independent and identically distributed, so the sample's estimate is their mean and
its standard error is their sample standard deviation over √R (Owen, Ann. Statist. 25(4):1541, 1997;
L'Ecuyer & Lemieux, "Recent advances in randomized quasi-Monte Carlo methods", 2002).  A texel's
replicate r is the mean over its samples of their replicate r (samples have independent shifts, so
these are still i.i.d. over r), and the texel's standard error is computed from those R texel
replicate means in the same way.  That estimate has only R − 1 degrees of freedom: an interval
stated at a confidence level uses the Student-t quantile :func:`coverage_factor` (for R = 4:
±3.18 σ̂ for 95%, ±1.20 σ̂ for 68.3%), not the normal 1.96 and 1 — that is what makes the bands
calibrated (scripts/calibration.py measures it).  With one ray (``--cone 0``) R = 1 and the standard
error is 0 (the measurement is deterministic).
"""

from __future__ import annotations

import math

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
    """Per-sample, per-replicate running sums of ray values (float64).

    Parameters
    ----------
    n : int
        Samples.
    replicates : int
        R; ray j of a sample belongs to replicate j mod R.
    """

    def __init__(self, n: int, replicates: int):
        self.replicates = int(replicates)
        self.count = np.zeros(n, np.int64)
        self.total = np.zeros((n, self.replicates), np.float64)

    def add(self, index: np.ndarray, values: np.ndarray) -> None:
        """Add (m, k) ray values to samples ``index`` (m,); the batch starts on a multiple of R and k is one."""
        m, k = values.shape
        assert k % self.replicates == 0, "a batch must hold whole rounds of replicates"
        self.count[index] += k
        self.total[index] += values.reshape(m, k // self.replicates, self.replicates).sum(axis=1)

    def replicate_means(self) -> np.ndarray:
        """(n, R) mean of each replicate's rays."""
        per_replicate = np.maximum(self.count // self.replicates, 1)
        return self.total / per_replicate[:, None]

    def mean(self) -> np.ndarray:
        """(n,) mean of all rays of each sample (= mean of its replicate means)."""
        return self.total.sum(axis=1) / np.maximum(self.count, 1)

    def stderr(self) -> np.ndarray:
        """(n,) standard error of each sample's mean from its replicates (:func:`replicate_stderr`)."""
        return replicate_stderr(self.replicate_means())


def replicate_stderr(replicate_means: np.ndarray) -> np.ndarray:
    """Standard error of the mean of R i.i.d. replicate estimates.

    Parameters
    ----------
    replicate_means : (n, R) float
        Replicate estimates per row.

    Returns
    -------
    (n,) float64
        sqrt(Σ (x_r − x̄)² / (R − 1)) / √R; 0 when R = 1 (no spread to measure).
    """
    x = np.asarray(replicate_means, np.float64)
    r = x.shape[1]
    if r < 2:
        return np.zeros(len(x))
    dev = x - x.mean(axis=1, keepdims=True)
    return np.sqrt(np.square(dev).sum(axis=1) / (r - 1) / r)


def coverage_factor(level: float, replicates: int) -> float:
    """k such that ±k·σ̂ covers the true value with probability ``level`` (two-sided).

    σ̂ is :func:`replicate_stderr` of R replicates; with normally distributed replicate means,
    (x̄ − μ)/σ̂ follows Student's t with R − 1 degrees of freedom (Student 1908), so
    k = t_{(1+level)/2, R−1}.  Returns inf for R < 2.

    Examples
    --------
    >>> round(coverage_factor(0.95, 4), 3)
    3.182
    """
    if replicates < 2:
        return math.inf
    from scipy import stats

    return float(stats.t.ppf(0.5 + 0.5 * float(level), replicates - 1))


def texel_reduce(texel: np.ndarray, sample_replicates: np.ndarray, sample_area: np.ndarray,
                 sample_rays: np.ndarray):
    """Combine sample statistics into texel statistics.

    Parameters
    ----------
    texel : (n,) int64
        Texel of each sample (any order).
    sample_replicates : (n, R) float64
        Replicate means of each sample (:meth:`Moments.replicate_means`).
    sample_area : (n,) float64
    sample_rays : (n,) int64
        Rays traced per sample.

    Returns
    -------
    texels : (t,) int64
        Distinct texels.
    mean : (t,) float64
        Mean of the texel's sample means.
    stderr : (t,) float64
        Standard error of that mean from the texel's R replicate means (each the mean over its
        samples of their replicate r), :func:`replicate_stderr`.
    area : (t,) float64
        World area the texel represents, scene units².
    claims : (t,) int64
        Samples per texel.
    rays : (t,) int64
        Rays traced per texel.
    """
    texels, inverse, claims = np.unique(texel, return_inverse=True, return_counts=True)
    s = claims.astype(np.float64)
    reps = np.stack([np.bincount(inverse, weights=sample_replicates[:, r], minlength=len(texels))
                     for r in range(sample_replicates.shape[1])], axis=1) / s[:, None]
    mean = reps.mean(axis=1)
    stderr = replicate_stderr(reps)
    area = np.bincount(inverse, weights=sample_area, minlength=len(texels))
    rays = np.bincount(inverse, weights=sample_rays, minlength=len(texels)).astype(np.int64)
    return texels, mean, stderr, area, claims, rays
