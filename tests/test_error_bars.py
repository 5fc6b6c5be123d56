"""Per-texel error bars from randomised quasi-Monte Carlo replicates, and their calibration.

Sources: the replicate estimator and its standard error are those of randomised QMC (Owen, "Scrambled
net variance for integrals of smooth functions", Ann. Statist. 25(4), 1997; L'Ecuyer & Lemieux,
"Recent advances in randomized quasi-Monte Carlo methods", 2002); the interval factors are Student-t
quantiles (scipy.stats.t); the sphere's texel value is the closed form of
thickbake.checks.error_budget.sphere_cone_expected, itself checked against scipy.integrate in
tests/test_verify.py.
"""

import math

import numpy as np
import pytest
from scipy import stats

import thickbake
from thickbake.checks import calibration
from thickbake.pipeline import directions as D
from thickbake.pipeline.measures import Moments, coverage_factor, replicate_stderr, texel_reduce


def test_replicate_stderr_is_the_standard_error_of_the_replicate_means():
    # scipy.stats.sem (ddof = 1) is the textbook standard error of a mean of i.i.d. values
    x = np.random.default_rng(4).normal(size=(50, 4))
    assert np.allclose(replicate_stderr(x), stats.sem(x, axis=1))
    assert np.array_equal(replicate_stderr(x[:, :1]), np.zeros(50))
    assert coverage_factor(0.95, 4) == pytest.approx(stats.t.ppf(0.975, 3))
    assert coverage_factor(0.95, 1) == math.inf


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
    # Share of texels inside the stated 95% (t_{0.975,3}·σ̂) and 68.3% (t_{0.841,3}·σ̂) bands against the
    # closed form.  Claim: 0.95 ± 0.03 and 0.683 ± 0.05 (the calibration targets); a share over n
    # independent texels (independent randomisations) spreads by sqrt(p(1 − p)/n) — 0.004 and 0.009 at
    # n ≈ 2,700 — so the test allows the claim's band plus 3 of those sd.  Facet bias of the
    # 384-segment sphere (6.7e-5) is under 3% of σ̂ here.
    expected = calibration.sphere_expected(1.0, cone, lobe, fine_sphere.diagonal)
    row = calibration.calibrate("sphere", fine_sphere, 64, lobe, cone, size=64, expected=expected)
    assert row.texels > 2000
    assert abs(row.share_95 - 0.95) <= 0.03 + 3 * row.binomial_sd_95
    assert abs(row.share_1sigma - calibration.LEVEL_1SIGMA) <= 0.05 + 3 * row.binomial_sd_1sigma
    # the reported error is the error of this estimator: RMS error and RMS σ̂ agree to their sampling
    # spread (an RMS over n values: relative sd ≈ sqrt(1/(2n)) · kurtosis factor; 10% is > 5 sd)
    assert row.rms_error == pytest.approx(row.rms_stderr, rel=0.10)
