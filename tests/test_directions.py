"""Direction samplers: the sample / pdf / inverse trio, known moments, reproducibility.

Tolerances: moments of n low-discrepancy or random directions are checked to 4 standard errors of
an independent-sampling estimate (σ/√n), which a Sobol set undercuts by far; probability of a false
failure under independent sampling < 1e-4 per check.
"""

import math

import numpy as np
import pytest
from scipy import integrate

from thickbake.pipeline import directions as D


@pytest.mark.parametrize("lobe", ["cosine", "uniform"])
@pytest.mark.parametrize("cone", [10.0, 45.0, 90.0])
def test_round_trip(lobe, cone):
    # sample -> inverse gives back u (pbrt-style sampler round trip)
    u = np.random.default_rng(1).random((2000, 2))
    d = D.sample_lobe(u, cone, lobe)
    assert np.allclose(np.linalg.norm(d, axis=1), 1, atol=1e-12)
    assert np.allclose(D.lobe_inverse(d, cone, lobe), u, atol=1e-9)


@pytest.mark.parametrize("lobe", ["cosine", "uniform"])
@pytest.mark.parametrize("cone", [10.0, 60.0, 90.0])
def test_pdf_integrates_to_one(lobe, cone):
    # independent numerical integration of the pdf over the cone's solid angle (scipy.integrate.dblquad)
    alpha = math.radians(cone)

    def integrand(theta, phi):
        d = np.array([[math.sin(theta) * math.cos(phi), math.sin(theta) * math.sin(phi), math.cos(theta)]])
        return float(D.lobe_pdf(d, cone, lobe)[0]) * math.sin(theta)

    total, _ = integrate.dblquad(integrand, 0, 2 * math.pi, 0, alpha)
    assert total == pytest.approx(1.0, abs=1e-7)


def test_cosine_hemisphere_mean_cos():
    # E[cosθ] = 2/3 under the cosine-weighted hemisphere (∫cos²θ sinθ dθ dφ / π = 2/3)
    n = 4096
    u1, u2 = D.variates(7, D.sample_keys(np.arange(1), np.zeros(1, np.int64), np.zeros(1, np.int64)), 0, n, "sobol")
    cos_t, _ = D.lobe_cos_sin(u1, 90.0, "cosine")
    sigma = math.sqrt(1 / 2 - 4 / 9)  # E[cos²θ] = 1/2 under the cosine lobe
    assert abs(cos_t.mean() - 2 / 3) < 4 * sigma / math.sqrt(n)


def test_uniform_hemisphere_mean_cos():
    # E[cosθ] = 1/2 uniformly over the hemisphere's solid angle
    u1, _ = D.variates(3, np.arange(64, dtype=np.uint64), 0, 256, "random")
    cos_t, _ = D.lobe_cos_sin(u1, 90.0, "uniform")
    sigma = math.sqrt(1 / 3 - 1 / 4)
    assert abs(cos_t.mean() - 0.5) < 4 * sigma / math.sqrt(cos_t.size)


def test_ray_directions_match_sample_lobe_rotated():
    rng = np.random.default_rng(2)
    axis = rng.normal(size=(50, 3))
    axis /= np.linalg.norm(axis, axis=1, keepdims=True)
    axis = axis.astype(np.float32)
    u1 = rng.random((50, 8)).astype(np.float32)
    u2 = rng.random((50, 8)).astype(np.float32)
    dirs, cos_t = D.ray_directions(u1, u2, axis, 70.0, "cosine")
    local = D.sample_lobe(np.stack([u1, u2], -1).astype(np.float64), 70.0, "cosine")
    t, b = D.orthonormal_frames(axis.astype(np.float64))
    expected = (local[..., 0:1] * t[:, None] + local[..., 1:2] * b[:, None] + local[..., 2:3] * axis[:, None]).reshape(-1, 3)
    assert np.allclose(dirs, expected, atol=2e-6)
    assert np.allclose(np.einsum("nkj,nj->nk", dirs.reshape(50, 8, 3), axis), cos_t, atol=2e-6)
    assert (cos_t >= math.cos(math.radians(70.0)) - 1e-6).all()


def test_frames_orthonormal():
    # Duff et al. 2017 basis: orthonormal and right-handed, including near the -z pole
    n = np.array([[0, 0, 1.0], [0, 0, -1.0], [1e-9, 0, -1.0], [0.6, 0.0, 0.8], [0.0, -0.6, 0.8]])
    n /= np.linalg.norm(n, axis=1, keepdims=True)
    t, b = D.orthonormal_frames(n)
    for x, y in ((t, b), (t, n), (b, n)):
        assert np.allclose(np.einsum("ij,ij->i", x, y), 0, atol=1e-12)
    assert np.allclose(np.cross(t, b), n, atol=1e-12)


def test_sobol_prefixes_nested_and_seeded():
    a = D.base_points(64, 5)
    assert np.array_equal(D.base_points(16, 5), a[:16])
    assert not np.array_equal(D.base_points(64, 6), a)
    # a balanced (0, m, 2)-net: every 1/64 stratum of each coordinate holds exactly one point
    for d in range(2):
        assert np.array_equal(np.sort(np.floor(a[:, d] * 64)), np.arange(64))


def test_variates_depend_only_on_seed_and_key():
    keys = D.sample_keys(np.arange(100), np.zeros(100, np.int64), np.arange(100))
    u1, u2 = D.variates(1, keys, 0, 32, "sobol")
    v1, v2 = D.variates(1, keys[::-1].copy(), 0, 32, "sobol")
    assert np.array_equal(u1, v1[::-1]) and np.array_equal(u2, v2[::-1])
    w1, _ = D.variates(1, keys[:10], 16, 32, "sobol")      # a later batch is the tail of the same set
    assert np.array_equal(w1, u1[:10, 16:])
    assert (u1 >= 0).all() and (u1 < 1).all()
