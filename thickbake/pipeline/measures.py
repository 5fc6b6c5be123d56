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

Three degrees of freedom are few, and on a thin wall the replicate means are skewed: a texel whose
replicates all missed the rare long grazing chords reports a short value *and* a small spread.  The
map's standard error is therefore moderated with its aligned 4×4-texel block, the empirical-Bayes
moderated variance of Smyth (2004): the own variance per ray shrunk towards the pooled variance per ray
of the block's other texels, with prior degrees of freedom d₀ estimated from how much single neighbouring
texels' variances differ (:func:`prior_dof`, :func:`map_prior_dof`, :func:`moderated_stderr_map`); bands
then use Student-t on d₀ᵢ + R − 1 degrees of freedom (:func:`dof_coverage_factor`).  Adaptive sampling
stops on the same moderated variance, with one d₀ per tile.
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


#: Side, in texels, of the aligned blocks whose texels lend each other strength in the moderated
#: variance (:func:`moderated_variance`): 16 neighbours within about two texels see nearly the same
#: integrand, and blocks aligned to multiples of 4 never straddle the bake's tiles (aligned powers of
#: two ≥ 16), so the map does not depend on the tiling.
MODERATION_BLOCK = 4


def _trigamma_inverse(y):
    """x with ψ'(x) = y > 0 (float or array): Newton's method on 1/ψ', as in Smyth (2004), appendix."""
    from scipy.special import polygamma

    y = np.asarray(y, np.float64)
    x = 0.5 + 1.0 / y
    for _ in range(50):
        tri = polygamma(1, x)
        step = tri * (1.0 - tri / y) / polygamma(2, x)
        x = x + step
        if np.all(-step / x < 1e-8):
            break
    x = np.where(y > 1e7, 1.0 / np.sqrt(y), np.where(y < 1e-6, 1.0 / y, x))
    return float(x) if x.ndim == 0 else x


def prior_dof(variance: np.ndarray, dof: int, group: np.ndarray) -> float:
    """Prior degrees of freedom d₀ of the variances' local spread: Smyth's moment estimator.

    Smyth (2004, §6.2) models each unit's true variance σᵢ² as drawn from a scaled inverse χ² prior
    with d₀ degrees of freedom, and its estimate sᵢ² as σᵢ² χ²_d / d.  Then eᵢ = log sᵢ² − ψ(d/2) +
    log(d/2) has variance ψ'(d/2) + ψ'(d₀/2), so the spread of the log variances beyond the sampling
    part ψ'(d/2) measures how much the true variances differ.  Here the prior is local: each unit is
    compared with the mean log variance ē₍ᵢ₎ of the *other* units of its group (leave-one-out, m
    others), whose own spread adds 1/m of the same variance, so ψ'(d₀/2) = mean[(eᵢ − ē₍ᵢ₎)² /
    (1 + 1/m)] − ψ'(d/2), one d₀ for all the units passed.  No spread beyond sampling gives d₀ = inf
    (the neighbours share one variance).  Zero variances (a unit whose replicates all agree) carry no
    log and are left out.

    Parameters
    ----------
    variance : (n,) float
        Variance estimates sᵢ², each on ``dof`` degrees of freedom (or all scaled by one constant:
        only the spread of the logs is read).
    dof : int
        d ≥ 1.
    group : (n,) int
        Group label of each unit (its aligned texel block).

    Returns
    -------
    float
        d₀ ≥ 0, possibly inf.

    References
    ----------
    G. K. Smyth, "Linear models and empirical Bayes methods for assessing differential expression in
    microarray experiments", Statistical Applications in Genetics and Molecular Biology 3(1), art. 3, 2004.
    """
    from scipy.special import polygamma

    v = np.asarray(variance, np.float64)
    group = np.asarray(group)
    labels = int(group.max()) + 1 if len(group) else 0
    ok = v > 0
    e = np.zeros(len(v))
    e[ok] = np.log(v[ok]) - _log_offset(dof)
    sums = np.bincount(group, weights=e * ok, minlength=labels)
    counts = np.bincount(group, weights=ok.astype(np.float64), minlength=labels)
    others = counts[group] - 1
    use = ok & (others >= 1)
    if not use.any():
        return math.inf
    m = others[use]
    r2 = np.square(e[use] - (sums[group][use] - e[use]) / m) / (1.0 + 1.0 / m)
    excess = float(r2.mean()) - float(polygamma(1, dof / 2))
    return 2.0 * _trigamma_inverse(excess) if excess > 0 else math.inf


def _log_offset(dof: float) -> float:
    """ψ(d/2) − log(d/2): E[log(χ²_d/d)], the mean offset of a log variance on d dof (0 for d = inf)."""
    from scipy.special import digamma

    return 0.0 if math.isinf(dof) else float(digamma(dof / 2)) - math.log(dof / 2)


def moderated_variance(variance: np.ndarray, dof: int, group: np.ndarray, d0=None):
    """Empirical-Bayes moderated variances: each unit's own estimate shrunk towards its neighbours'.

    s̃ᵢ² = (d₀ᵢ s₀ᵢ² + d sᵢ²) / (d₀ᵢ + d) on d₀ᵢ + d degrees of freedom, Smyth's (2004, §4) posterior
    variance, with the local prior s₀ᵢ² the plain mean of sⱼ² over the other units of i's group (mᵢ of
    them) and d₀ᵢ = min(d₀, d·mᵢ): a prior pooled over m neighbours holds at most their d·m degrees of
    freedom; a unit alone in its group keeps its own estimate.

    Two deliberate departures from Smyth, both towards wider bands.  (1) His prior scale is estimated on
    the log scale (§6.2: s₀² = exp(ē + ψ(d₀/2) − log(d₀/2)), ē the mean of eⱼ = log sⱼ² − ψ(d/2) +
    log(d/2)); the plain mean used here estimates the prior's mean d₀s₀²/(d₀ − 2) instead, so for a
    finite d₀ the bands are wider than his model needs (simulated under it: 95% bands cover about
    0.976 / 0.966 / 0.959 at d₀ = 3 / 6 / 12).  His form was measured and not taken: a finite d₀ arises
    on a thin wall, whose skewed replicate means put the log-scale mean well below the mean variance,
    and there it under-covers (0.91 where the target is 0.95; README, *Error bars*).  (2) For d₀ = inf
    (the neighbours share i's variance) s̃ᵢ² is the pooled variance of the whole group on d·(m + 1)
    degrees of freedom, the one-way analysis of variance, for which Student's t on d·(m + 1) dof is exact
    (normal replicate means); for a finite d₀ the t on d₀ᵢ + d dof is Smyth's model's, approximate here.

    Texels of a thin wall whose few rays missed its rare long grazing chords report both a short value
    and a small spread; their neighbours saw such chords, so the moderated variance no longer shrinks
    together with the error, which is what keeps the stated bands honest there.

    Parameters
    ----------
    variance : (n,) float
        Own variance estimates on ``dof`` degrees of freedom.
    dof : int
    group : (n,) int
        Group label (aligned texel block) of each unit.
    d0 : float or (g,) float, optional
        Prior degrees of freedom, one or one per group label; :func:`prior_dof` of these units if omitted.

    Returns
    -------
    variance : (n,) float64
    dof : (n,) float64
        d₀ᵢ + d.
    """
    v = np.asarray(variance, np.float64)
    group = np.asarray(group)
    if len(v) == 0 or dof < 1:
        return v.copy(), np.full(len(v), float(max(dof, 0)))
    if d0 is None:
        d0 = prior_dof(v, dof, group)
    labels = int(group.max()) + 1
    sums = np.bincount(group, weights=v, minlength=labels)
    others = np.bincount(group, minlength=labels)[group] - 1
    prior = (sums[group] - v) / np.maximum(others, 1)
    d0_unit = np.asarray(d0, np.float64)[group] if np.ndim(d0) else np.full(len(v), float(d0))
    d0_unit = np.minimum(d0_unit, dof * others.astype(np.float64))
    return (d0_unit * prior + dof * v) / (d0_unit + dof), d0_unit + dof


def _blocks(a: np.ndarray, block: int) -> np.ndarray:
    """(H/b, b, W/b, b) view of an (h, w) array zero-padded to multiples of ``block``."""
    h, w = a.shape
    pad = ((0, -h % block), (0, -w % block))
    if any(p for _, p in pad):
        a = np.pad(a, pad)
    return a.reshape(a.shape[0] // block, block, a.shape[1] // block, block)


def map_prior_dof(variance: np.ndarray, covered: np.ndarray, dof: int, block: int = MODERATION_BLOCK,
                  strata: np.ndarray | None = None) -> float:
    """d₀ of a map's texel variances: :func:`prior_dof` on single covered texels, each compared with the
    other texels of its aligned block (and stratum), the same units the moderation applies d₀ to.

    Computed on the grid in float32 (block sums broadcast back to their texels, sums of squares in
    float64), so a 4096² map needs a few map-sized float32 arrays, no per-texel index arrays.

    Parameters
    ----------
    variance : (h, w) float
        Own variance estimate of each texel (or a fixed multiple of it: the estimator reads only the
        spread of the logs) on ``dof`` degrees of freedom.
    covered : (h, w) bool
    dof : int
    strata : (h, w) int, optional
        Texels compare only with texels of the same stratum.

    Returns
    -------
    float
        d₀ ≥ 0, possibly inf.
    """
    from scipy.special import polygamma

    var_b = _blocks(np.asarray(variance, np.float32), block)
    positive = _blocks(np.asarray(covered, bool), block) & (var_b > 0)
    e_b = np.zeros(var_b.shape, np.float32)
    np.log(var_b, out=e_b, where=positive)
    total, used = 0.0, 0
    for level in [None] if strata is None else np.unique(np.asarray(strata)[covered]):
        mine = positive if level is None else positive & _blocks(np.asarray(strata) == level, block)
        e = np.where(mine, e_b, np.float32(0))
        others = mine.sum(axis=(1, 3), dtype=np.float32)[:, None, :, None] - np.float32(1)
        loo = e.sum(axis=(1, 3), dtype=np.float64).astype(np.float32)[:, None, :, None] - e
        loo /= np.maximum(others, 1)
        use = mine & (others >= 1)
        r2 = np.square(e - loo, out=loo)
        r2 /= 1 + 1 / np.maximum(others, 1)                    # the leave-one-out mean's own spread
        total += float(r2.sum(dtype=np.float64, where=use))
        used += int(np.count_nonzero(use))
    if used == 0:
        return math.inf
    excess = total / used - float(polygamma(1, dof / 2))
    return 2.0 * _trigamma_inverse(excess) if excess > 0 else math.inf


def _stratified(block: np.ndarray, stratum: np.ndarray) -> np.ndarray:
    """(n,) int64 group labels of the distinct (block, stratum) pairs (the block labels themselves when
    there is one stratum)."""
    stratum = np.asarray(stratum)
    if len(stratum) == 0 or stratum.min() == stratum.max():
        return np.asarray(block, np.int64)
    _, codes = np.unique(stratum, return_inverse=True)
    key = np.asarray(block, np.int64) * (int(codes.max(initial=0)) + 1) + codes.reshape(-1)
    return np.unique(key, return_inverse=True)[1].reshape(-1)


def moderated_stderr_map(stderr: np.ndarray, covered: np.ndarray, dof: int, block: int = MODERATION_BLOCK,
                         strata: np.ndarray | None = None, count: np.ndarray | None = None):
    """A map's standard errors moderated over aligned texel blocks (:func:`moderated_variance`).

    Computed on the grid (block sums broadcast back to their texels, float32 per texel), so a 4096²
    map needs a few map-sized float32 arrays; one pass per stratum.

    Parameters
    ----------
    stderr : (h, w) float
        Each texel's own replicate standard error (:func:`replicate_stderr`), measure units.
    covered : (h, w) bool
    dof : int
        Degrees of freedom of the own estimates, R − 1 (0: no error estimate, returned unchanged).
    strata : (h, w) int, optional
        A texel borrows only from texels of its block in the same stratum (an adaptive bake passes
        the rays per texel: a neighbour that stopped earlier has a larger variance).
    count : (h, w) int, optional
        Rays (or samples) each texel's mean averages.  The variance of a mean of n independently
        randomised samples is the per-sample variance over n, so the moderation (and d₀) works on
        sᵢ²·nᵢ and divides each result back by nᵢ: a texel on an island border holding fewer samples
        borrows its neighbours' per-sample variance, not their smaller variance of a larger mean.

    Returns
    -------
    stderr : (h, w) float32
        Moderated standard errors (0 off ``covered``).
    dof : (h, w) float32
        Degrees of freedom of each (d₀ᵢ + d; 0 off ``covered``).
    prior_dof : float
        The map's d₀ (:func:`map_prior_dof`), possibly inf; 0 when ``dof`` < 1.
    """
    h, w = covered.shape
    if dof < 1 or not covered.any():
        out = np.zeros((h, w), np.float32)
        out[covered] = np.asarray(stderr)[covered]
        return out, np.zeros((h, w), np.float32), 0.0
    variance = np.square(np.where(covered, stderr, 0).astype(np.float32))
    if count is not None:                                  # per-ray variance; off ``covered`` it is 0
        np.multiply(variance, count, out=variance, casting="unsafe")
    d0 = map_prior_dof(variance, covered, dof, block, strata)
    var_b = _blocks(variance, block)
    out_b = np.zeros(var_b.shape, np.float32)
    dof_b = np.zeros(var_b.shape, np.float32)
    for level in [None] if strata is None else np.unique(np.asarray(strata)[covered]):
        mine_b = _blocks(covered if level is None else covered & (strata == level), block)
        own = np.where(mine_b, var_b, np.float32(0))
        others = np.maximum(mine_b.sum(axis=(1, 3), dtype=np.float32)[:, None, :, None] - 1, 0)
        weight = np.minimum(np.float32(min(d0, 1e30)), dof * others)  # d₀ᵢ, one per block
        sums = own.sum(axis=(1, 3), dtype=np.float64).astype(np.float32)[:, None, :, None]
        prior = sums - own                                             # s₀ᵢ²: mean of the others
        prior /= np.maximum(others, 1)
        prior *= weight
        own *= dof
        prior += own
        prior /= weight + dof                                          # (d₀ᵢ s₀ᵢ² + d sᵢ²)/(d₀ᵢ + d)
        np.copyto(out_b, prior, where=mine_b)
        np.copyto(dof_b, weight + dof, where=mine_b, casting="unsafe")
    del var_b, variance, own, prior
    rows = out_b.shape[0] * block
    out = out_b.reshape(rows, -1)[:h, :w].copy()
    del out_b
    if count is not None:
        np.divide(out, count, out=out, where=covered, casting="unsafe")
    np.sqrt(out, out=out)
    return out, dof_b.reshape(rows, -1)[:h, :w].copy(), d0


def block_labels(texel: np.ndarray, width: int, block: int = MODERATION_BLOCK) -> np.ndarray:
    """(n,) int64 label of the aligned ``block`` × ``block`` texel block of each row-major texel index."""
    texel = np.asarray(texel, np.int64)
    per_row = -(-int(width) // block)
    return (texel // width // block) * per_row + (texel % width) // block


def coverage_factor(level: float, replicates: int) -> float:
    """k such that ±k·σ̂ covers the true value with probability ``level`` (two-sided).

    σ̂ is :func:`replicate_stderr` of R replicates; with normally distributed replicate means,
    (x̄ − μ)/σ̂ follows Student's t with R − 1 degrees of freedom (Student 1908), so
    k = t_{(1+level)/2, R−1}.  Returns inf for R < 2.  For a moderated σ̃ use
    :func:`dof_coverage_factor` with its degrees of freedom.

    Examples
    --------
    >>> round(coverage_factor(0.95, 4), 3)
    3.182
    """
    if replicates < 2:
        return math.inf
    return float(dof_coverage_factor(level, replicates - 1))


def dof_coverage_factor(level: float, dof):
    """k = t_{(1+level)/2, dof}: the two-sided ``level`` band of a standard error on ``dof`` degrees of
    freedom (float or array; inf dof gives the normal quantile; 0 dof gives inf).

    For the moderated σ̃ of :func:`moderated_variance` the bands use d₀ᵢ + d degrees of freedom: exact
    (one-way pooling, normal replicate means) where d₀ is unbounded; for a finite d₀ Smyth's (2004, §4)
    t, here conservative because the prior scale is the neighbours' plain mean (see there).

    Examples
    --------
    >>> round(float(dof_coverage_factor(0.95, 48.0)), 3)
    2.011
    """
    from scipy import stats

    d = np.asarray(dof, np.float64)
    k = np.where(d > 0, stats.t.ppf(0.5 + 0.5 * float(level), np.maximum(d, 1e-9)), np.inf)
    return float(k) if k.ndim == 0 else k


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
