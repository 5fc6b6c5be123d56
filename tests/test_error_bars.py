"""Per-texel error bars from randomised quasi-Monte Carlo replicates, and their calibration.

Sources: the replicate estimator and its standard error are those of randomised QMC (Owen, "Scrambled
net variance for integrals of smooth functions", Ann. Statist. 25(4), 1997; L'Ecuyer & Lemieux,
"Recent advances in randomized quasi-Monte Carlo methods", 2002); the interval factors are Student-t
quantiles (scipy.stats.t); the moderated variance and its prior degrees of freedom are the empirical-Bayes
estimators of G. K. Smyth, "Linear models and empirical Bayes methods for assessing differential expression
in microarray experiments", Stat. Appl. Genet. Mol. Biol. 3(1), 2004 (§4 and §6.2), checked here on data
drawn from that paper's own hierarchical model; the sphere's texel value is the closed form of
thickbake.checks.error_budget.sphere_cone_expected, itself checked against scipy.integrate in
tests/test_verify.py.
"""

import math

import numpy as np
import pytest
from scipy import stats

import thickbake
from thickbake.checks import calibration, shapes
from thickbake.pipeline import directions as D
from thickbake.pipeline.measures import (Moments, coverage_factor, dof_coverage_factor, map_prior_dof,
                                         moderated_stderr_map, moderated_variance, prior_dof, replicate_stderr,
                                         texel_reduce)


def test_replicate_stderr_is_the_standard_error_of_the_replicate_means():
    # scipy.stats.sem (ddof = 1) is the textbook standard error of a mean of i.i.d. values
    x = np.random.default_rng(4).normal(size=(50, 4))
    assert np.allclose(replicate_stderr(x), stats.sem(x, axis=1))
    assert np.array_equal(replicate_stderr(x[:, :1]), np.zeros(50))
    assert coverage_factor(0.95, 4) == pytest.approx(stats.t.ppf(0.975, 3))
    assert coverage_factor(0.95, 1) == math.inf
    assert np.allclose(dof_coverage_factor(0.95, [3.0, 48.0, np.inf]), stats.t.ppf(0.975, [3, 48, np.inf]))


def test_moderated_variance_pools_shrinks_and_keeps_lone_units():
    v = np.array([1.0, 2.0, 3.0, 6.0, 5.0])
    group = np.array([0, 0, 0, 0, 1])
    # d0 = inf: every unit of a group gets the group's pooled variance on d·(m + 1) dof (one-way ANOVA)
    out, dof = moderated_variance(v, 3, group, np.inf)
    assert np.allclose(out, [3, 3, 3, 3, 5]) and np.allclose(dof, [12, 12, 12, 12, 3])
    # finite d0: (d0·s0² + d·s²)/(d0 + d) (Smyth 2004, §4), s0² here the plain mean of the other units of
    # the group (a documented conservative departure from his log-scale s0², see moderated_variance)
    out, dof = moderated_variance(v, 3, group, 6.0)
    assert out[0] == pytest.approx((6 * (2 + 3 + 6) / 3 + 3 * 1) / 9) and dof[0] == 9
    assert out[4] == 5 and dof[4] == 3                       # alone in its block: its own estimate
    # d0 = 0: own estimates
    assert np.allclose(moderated_variance(v, 3, group, 0.0)[0], v)


def test_prior_dof_recovers_the_hierarchical_model():
    # Smyth's model: 1/σᵢ² ~ χ²_{d0}/(d0·s0²) with s0² varying from block to block, sᵢ² = σᵢ² χ²_d/d.
    # The moment estimator is consistent; its spread is measured over 20 independent draws and the mean
    # must lie within 4 standard errors of the mean of the true d0 (a 6e-5 two-sided normal risk).
    rng = np.random.default_rng(14)
    d, d0, blocks, per_block = 3, 10.0, 1000, 16
    estimates = []
    for _ in range(20):
        s0 = np.repeat(np.exp(rng.normal(0, 2, blocks)), per_block)   # the local prior changes freely
        sigma2 = d0 * s0 / rng.chisquare(d0, len(s0))
        s2 = sigma2 * rng.chisquare(d, len(s0)) / d
        estimates.append(prior_dof(s2, d, np.repeat(np.arange(blocks), per_block)))
    estimates = np.array(estimates)
    assert abs(estimates.mean() - d0) <= 4 * estimates.std(ddof=1) / math.sqrt(len(estimates))
    # one shared variance per block: no spread beyond sampling, so d0 is large or infinite.  The excess
    # spread mean(r²) − ψ'(3/2) then has mean 0 and sd sqrt(var(r²)/n) = sqrt(3.13/16000) = 0.014 (var of
    # the squared centred log χ²₃/3, 3.13, by simulation); 4 sd above 0 is ψ'(d0/2) = 0.056, d0 = 36.8.
    s2 = np.repeat(np.exp(rng.normal(0, 2, blocks)), per_block) * rng.chisquare(d, blocks * per_block) / d
    assert prior_dof(s2, d, np.repeat(np.arange(blocks), per_block)) > 36.8


def test_map_prior_dof_on_the_grid_is_prior_dof_of_single_texels():
    # the map estimator works on the grid in float32; it must be prior_dof (float64) of the covered
    # texels grouped by aligned block and stratum, zero variances left out: equal to float32 rounding
    rng = np.random.default_rng(6)
    v = np.exp(rng.normal(0, 1, (50, 70))) * rng.chisquare(3, (50, 70)) / 3
    covered = rng.random((50, 70)) < 0.8
    v[rng.random((50, 70)) < 0.02] = 0
    strata = rng.integers(0, 3, (50, 70))
    index = np.flatnonzero(covered.ravel())
    block = (index // 70 // 4) * 18 + (index % 70) // 4
    assert map_prior_dof(v, covered, 3) == pytest.approx(prior_dof(v.ravel()[index], 3, block), rel=1e-5)
    key = np.unique(block * 3 + strata.ravel()[index], return_inverse=True)[1]
    assert map_prior_dof(v, covered, 3, strata=strata) == pytest.approx(prior_dof(v.ravel()[index], 3, key), rel=1e-5)


def _smyth_map(rng, d0, side=256, block=4):
    """(side, side) texel variances under Smyth's model: a scale s0² per aligned block (free, log-normal),
    σ² = d0·s0²/χ²_{d0} per texel, s² = σ² χ²₃/3 (R = 4 replicates)."""
    s0 = np.kron(np.exp(rng.normal(0, 2, (side // block, side // block))), np.ones((block, block)))
    sigma2 = d0 * s0 / rng.chisquare(d0, (side, side))
    return sigma2 * rng.chisquare(3, (side, side)) / 3


@pytest.mark.parametrize("d0", [4.0, 10.0, 30.0])
def test_map_prior_dof_recovers_the_hierarchical_model_on_single_texels(d0):
    # The map estimator must read d0 on the units it is applied to (single texels): an estimate on
    # 2×2-averaged variances came out about 7 / 23 / 80 for these true 4 / 10 / 30.  Spread measured over
    # 20 independent 256² maps; their mean must lie within 4 standard errors of the true d0 (6e-5 risk).
    rng = np.random.default_rng(int(d0))
    covered = np.ones((256, 256), bool)
    estimates = np.array([map_prior_dof(_smyth_map(rng, d0), covered, 3) for _ in range(20)])
    assert abs(estimates.mean() - d0) <= 4 * estimates.std(ddof=1) / math.sqrt(len(estimates))
    # the moderated map reports it and gives every texel of a full block min(d0, 3·15) + 3 dof
    _, dof, reported = moderated_stderr_map(np.sqrt(_smyth_map(rng, d0)), covered, 3)
    assert np.allclose(dof, min(reported, 45.0) + 3, rtol=1e-6)         # float32 map


def test_moderated_map_borrows_only_within_aligned_blocks_and_strata():
    stderr = np.ones((8, 8))
    stderr[:4, :4] = 2.0                   # one block twice as noisy: its neighbours stay untouched
    covered = np.ones((8, 8), bool)
    out, dof, d0 = moderated_stderr_map(stderr, covered, 3)
    assert d0 == math.inf and np.allclose(out, stderr) and np.all(dof == 48)
    strata = np.zeros((8, 8), int)
    strata[0, 0] = 1                       # a texel that traced a different number of rays stands alone
    out, dof, _ = moderated_stderr_map(stderr, covered, 3, strata=strata)
    assert dof[0, 0] == 3 and dof[0, 1] == 45
    out, dof, d0 = moderated_stderr_map(stderr, covered, 0)
    assert np.all(dof == 0) and d0 == 0


def test_moderated_map_borrows_per_ray_variance():
    # A texel holding half the rays (an island-border texel with half the samples) has twice the
    # variance of its mean: with ``count`` it borrows its neighbours' per-ray variance, so all texels
    # that share one per-ray variance keep it exactly (one-way pooling of s²·n, then divided by n).
    count = np.full((8, 8), 32)
    count[0, 0] = 16
    stderr = np.sqrt(1.0 / count)
    covered = np.ones((8, 8), bool)
    out, dof, d0 = moderated_stderr_map(stderr, covered, 3, count=count)
    assert d0 == math.inf and np.allclose(out, stderr) and np.all(dof == 48)
    out, *_ = moderated_stderr_map(stderr, covered, 3)          # without: the border texel shrinks
    assert out[0, 0] < 0.8 * stderr[0, 0]


def test_moments_split_rays_into_replicates():
    m = Moments(2, 4)
    values = np.arange(16, dtype=np.float64).reshape(2, 8)        # rays 0..7: replicate j mod 4
    m.add(np.arange(2), values)
    assert np.allclose(m.replicate_means(), [[2, 3, 4, 5], [10, 11, 12, 13]])
    assert np.allclose(m.mean(), values.mean(axis=1))
    # a texel with two samples: its replicate r is the mean of the samples' replicate r
    texels, mean, stderr, *_ = texel_reduce(np.array([7, 7]), m.replicate_means(), np.ones(2), m.count)
    assert np.allclose(mean, [7.5]) and np.allclose(stderr, stats.sem([6, 7, 8, 9]))


def test_replicates_are_independent_shifts_of_one_nested_net():
    keys = D.sample_keys(np.arange(3), np.zeros(3, np.int64), np.zeros(3, np.int64))
    u1, u2 = D.variates(9, keys, 0, 64, "sobol", 4)
    base = D.base_points(16, 9)
    for r in range(4):
        # replicate r = rays r, r+4, …: the 16-point net shifted by one offset (mod 1), so every 1/16
        # stratum of each coordinate still holds exactly one point (a shifted stratification)
        shift = (u1[:, r::4] - base[None, :, 0].astype(np.float32)) % 1.0
        assert np.allclose(shift, shift[:, :1], atol=1e-6)
        for s in range(3):
            assert np.array_equal(np.sort(np.floor(((u1[s, r::4] - shift[s, 0]) % 1.0) * 16 + 1e-4) % 16), np.arange(16))
    assert len({round(float(x), 6) for x in (u1[0, 0:4] - base[0, 0]) % 1.0}) == 4   # four different shifts
    # later batches continue every replicate's net
    w1, _ = D.variates(9, keys, 16, 64, "sobol", 4)
    assert np.array_equal(w1, u1[:, 16:])


def test_ray_counts_round_up_to_whole_replicates():
    assert [D.rays_per_sample(n) for n in (1, 2, 3, 4, 5, 16, 50, 64)] == [1, 2, 3, 4, 8, 16, 52, 64]
    assert [D.replicate_count(n) for n in (1, 3, 4, 64)] == [1, 3, 4, 4]


@pytest.fixture(scope="module")
def fine_sphere():
    from thickbake.pipeline.load import load_asset

    return load_asset(calibration.fine_sphere().mesh, name="sphere")


def test_cone_zero_stays_exact_and_random_sequence_runs(fine_sphere):
    # one ray along the normal: chord 2R, no error bar (deterministic)
    r0 = thickbake.bake(fine_sphere, size=32, rays=64, cone=0)
    assert r0.info["rays_traced"] == r0.info["surface_samples"]
    assert np.all(r0.stderr[r0.covered] == 0)
    assert abs(r0.values[r0.covered].mean() - 2.0) < 1e-3      # facet error 2R(1 − cos(π/384)) = 6.7e-5
    rr = thickbake.bake(fine_sphere, size=32, rays=16, sequence="random")
    assert np.all(rr.stderr[rr.covered] > 0)


@pytest.mark.parametrize("lobe,cone", [("cosine", 90.0), ("uniform", 30.0)])
def test_sphere_error_bars_are_calibrated(fine_sphere, lobe, cone):
    # Share of texels inside the stated 95% and 68.3% bands (Student-t on each texel's moderated dof)
    # against the closed form.  Claim: 0.95 ± 0.03 and 0.683 ± 0.05 (the calibration targets); a share
    # over n independent texels (independent randomisations) spreads by sqrt(p(1 − p)/n) — 0.004 and
    # 0.009 at n ≈ 2,700 — so the test allows the claim's band plus 3 of those sd.  Facet bias of the
    # 384-segment sphere (6.7e-5) is under 3% of σ̃ here.
    expected = calibration.sphere_expected(1.0, cone, lobe, fine_sphere.diagonal)
    row = calibration.calibrate("sphere", fine_sphere, 64, lobe, cone, size=64, expected=expected)
    assert row.texels > 2000
    assert abs(row.share_95 - 0.95) <= 0.03 + 3 * row.binomial_sd_95
    assert abs(row.share_1sigma - calibration.LEVEL_1SIGMA) <= 0.05 + 3 * row.binomial_sd_1sigma
    # the reported error is the error of this estimator: RMS error and RMS σ̃ agree to their sampling
    # spread (an RMS over n values: relative sd ≈ sqrt(1/(2n)) · kurtosis factor; 10% is > 5 sd)
    assert row.rms_error == pytest.approx(row.rms_stderr, rel=0.10)
    # the sphere's texels share one variance: the moderated σ̃ pools each 4×4 block (48 dof)
    assert row.prior_dof is None and row.dof_median == 48


@pytest.fixture(scope="module")
def shell_and_ball():
    from thickbake.pipeline.load import load_asset

    return load_asset(shapes.shell_and_ball(wall_thickness=0.02, ball_radius=0.5).mesh, name="shell_and_ball")


@pytest.mark.parametrize("rays,lobe,cone", [(16, "cosine", 90.0), (64, "cosine", 90.0), (16, "uniform", 90.0)])
def test_thin_wall_error_bars_are_calibrated(shell_and_ball, rays, lobe, cone):
    # The rows of the calibration table that the 3-dof replicate error bars missed (0.852 / 0.610 at
    # 16 rays under the cosine lobe, cone 90°; 0.921 at 64 rays): a 4-ray replicate of the 2%-wall shell
    # mostly holds none of the rare long grazing chords, so its own spread shrinks with its error.  The
    # moderated σ̃ borrows the neighbours' spread.  Truth: a bake with 32× the rays (its own error adds
    # at most 1/32 of the variance).  Tolerance as for the sphere: the target band plus 3 binomial sd
    # (0.006 and 0.012 at n ≈ 1,500 texels).
    row = calibration.calibrate("shell + ball", shell_and_ball, rays, lobe, cone, size=48)
    assert row.texels > 1000
    assert abs(row.share_95 - 0.95) <= 0.03 + 3 * row.binomial_sd_95
    assert abs(row.share_1sigma - calibration.LEVEL_1SIGMA) <= 0.05 + 3 * row.binomial_sd_1sigma


def test_partially_covered_texels_keep_calibrated_bands_with_supersampling(fine_sphere):
    # With --supersample 2 a texel on an island border holds fewer samples than an inner one, so its mean
    # has a larger variance; moderating the per-ray variance keeps its band honest (it borrowed the
    # block's smaller variance of fuller texels before: 95% coverage 0.866 / 0.889 / 0.920 at seeds
    # 1 / 2 / 3, 261 border texels each).  Pooled over three seeds (independent randomisations), n = 783
    # border texels: binomial sd of the 95% share sqrt(0.95·0.05/783) = 0.0078; the claim 0.95 must hold
    # within 4 sd (0.031).  Truth: the closed form (cosine lobe, cone 90°).
    expected = calibration.sphere_expected(1.0, 90.0, "cosine", fine_sphere.diagonal)
    inside = []
    for seed in (1, 2, 3):
        result = thickbake.bake(fine_sphere, size=64, rays=16, seed=seed, supersample=2)
        cov = result.covered
        border = result.rays[cov] < result.rays[cov].max()
        k = dof_coverage_factor(0.95, result.stderr_dof[cov].astype(np.float64))
        ok = np.abs(result.values[cov] - expected) <= k * result.stderr[cov]
        inside.append(ok[border])
    inside = np.concatenate(inside)
    assert len(inside) > 500
    assert abs(inside.mean() - 0.95) <= 4 * math.sqrt(0.95 * 0.05 / len(inside))
