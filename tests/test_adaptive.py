"""Adaptive ray counts (--target-error) and the benchmark script's smoke run.

No timing is asserted here: performance is measured by scripts/bench.py, side by side in one run.
"""

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import thickbake
from thickbake.checks import shapes
from thickbake.pipeline.driver import _needs_more, _ray_schedule
from thickbake.pipeline.measures import Moments, prior_dof

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def sphere():
    return shapes.sphere(radius=1.0)


def test_adaptive_meets_target_on_sphere(sphere):
    # sphere R = 1, cosine lobe, closed form 4R/3 (chord 2R cosθ averaged over the cosine lobe).
    # A sample stops once its moderated variance is at most E².  Here (one sample per texel) where the
    # tile's d0 is at least 3·15 = 45 — as for agreeing variances (tests: the stopping-rule test below) —
    # every active sample of a block is judged on the same value, the pooled variance of the block's
    # active samples, so they stop together; the map's moderation, with d0 unbounded (checked), pools
    # exactly those texels (its strata are the ray counts), so each such texel reports that same pooled
    # σ̃ ≤ E, up to float32 rounding (relative 1e-6).  Since the error bars are calibrated
    # (tests/test_error_bars.py), the RMS of the actual errors is then at most E, up to the sampling
    # spread of an RMS over n ≈ 2,700 texels (relative sd sqrt(1/(2n)) ≈ 1.4%; 4 sd = 6%).
    target, cap = 0.03, 256
    adaptive = thickbake.bake(sphere.mesh, size=64, rays=cap, target_error=target)
    rays = adaptive.rays[adaptive.covered]
    early = rays < cap
    assert early.mean() > 0.99
    assert adaptive.info["stderr_dof"]["prior"] is None
    assert adaptive.stderr[adaptive.covered][early].max() <= target * (1 + 1e-6)
    # the ladder of batch ends: 8, 12, 16, 24, 32, 48, 64, … (steps of about √2)
    assert set(np.unique(rays)) <= {8, 12, 16, 24, 32, 48, 64, 96, 128, 192, 256}
    err = adaptive.values[adaptive.covered] - 4 / 3
    assert math.sqrt(np.mean(err ** 2)) <= target * 1.06
    assert adaptive.info["rays_saved"] + adaptive.info["rays_traced"] == adaptive.covered.sum() * cap
    assert adaptive.info["rays_saved"] > 0.5 * adaptive.info["rays_traced"]
    # the rays are a prefix of the same replicated low-discrepancy sets: a texel that stopped at n rays
    # is identical to a fixed n-ray bake there
    for n in np.unique(rays):
        fixed = thickbake.bake(sphere.mesh, size=64, rays=int(n))
        same = rays == n
        assert np.array_equal(fixed.values[fixed.covered][same], adaptive.values[adaptive.covered][same])


def test_ray_ladder_steps_by_about_root_two_and_ends_on_the_cap():
    assert _ray_schedule(64, True) == [(0, 8), (8, 12), (12, 16), (16, 24), (24, 32), (32, 48), (48, 64)]
    assert _ray_schedule(52, True)[-1] == (48, 52)
    assert _ray_schedule(64, False) == [(0, 64)] and _ray_schedule(8, True) == [(0, 8)]
    # every batch covers whole rounds of the R = 4 replicates
    assert all(a % 4 == 0 for a, _ in _ray_schedule(256, True))


def test_stopping_rule_borrows_from_agreeing_neighbours_only():
    # A tile of 256 aligned blocks of 16 samples, 8 rays each (2 per replicate, normal values: own
    # variances exactly σ² χ²₃/3).  All true variances agree, but some samples report a spread above E²
    # by chance.  d0 is estimated once from the whole tile (Smyth's estimator, each sample against its
    # block): its excess spread has mean 0 and sd sqrt(3.13/4096) = 0.028 (tests/test_error_bars.py), so
    # d0 ≥ 3·15 = 45, i.e. ψ'(d0/2) ≤ 0.0455 (1.65 sd), holds for 95% of draws — and for this fixed one,
    # checked below.  Then every sample is judged on its block's pooled variance (45 + 3 = 48 dof), so a
    # block whose pooled variance is under E² stops as a whole.  (A d0 per block, from ≤ 16 samples,
    # came out finite for about 40% of such blocks, and their noisy samples went on.)
    rng = np.random.default_rng(3)
    n = 256 * 16
    m = Moments(n, 4)
    m.add(np.arange(n), rng.normal(1.0, 0.1, (n, 8)))
    var = np.square(m.stderr())
    block = np.repeat(np.arange(256), 16)
    assert prior_dof(var, 3, block) >= 45
    pooled = np.bincount(block, weights=var) / 16
    target = math.sqrt(pooled.max()) * 1.01
    more = _needs_more(m, np.arange(n), block, target, 64)
    assert not more.any() and (var > target ** 2).sum() > 100
    # one sample in one block whose replicate means spread 100× more (a thick part beside a thin one):
    # with any prior weight d0ᵢ ≤ 45 its own 3 dof carry at least 3/48 of its several-hundredfold variance, so it
    # goes on (its quiet block-mates go on too: their prior is the mean of the others' variances)
    m.add(np.arange(1), np.array([[-5.0, 5.0, -5.0, 5.0, 0.0, 0.0, 0.0, 0.0]]))
    assert _needs_more(m, np.arange(n), block, target, 64)[0]
    # a sample at the cap never goes on
    assert not _needs_more(m, np.arange(n), block, 1e-9, 8).any()


def test_adaptive_spends_more_rays_on_thick_parts():
    # thin shell beside a solid ball: the ball's chords vary far more, so it gets more rays
    mesh = shapes.shell_and_ball(wall_thickness=0.02, ball_radius=0.5).mesh
    result = thickbake.bake(mesh, size=64, rays=64, target_error=0.01)
    values, rays = result.values[result.covered], result.rays[result.covered]
    thick = values > 0.3  # ball texels: mean chord 4R/3 ≈ 0.67; shell texels: a few wall thicknesses
    assert rays[thick].mean() > 2 * rays[~thick].mean()
    assert result.info["rays_saved"] > 0


def test_bench_quick_runs(tmp_path):
    out = tmp_path / "bench.json"
    proc = subprocess.run([sys.executable, str(ROOT / "scripts" / "bench.py"), "--quick", "--json", str(out)],
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    for label in ("B/A", "B/C", "B(all)/B(1)", "Sobol", "adaptive", "Z order", "calibration", "leak guard", "re-traced"):
        assert label in proc.stdout
    figures = json.loads(out.read_text())
    assert figures["throughput"]["rays"] > 0 and figures["noise"]["rms_sobol"] > 0


def test_adaptive_map_independent_of_threads_order_and_work_item_size():
    # Run options (threads, ray order, rays per work item) must not change a map, adaptive included:
    # the stopping rule's prior d₀ is estimated per aligned 16-texel region, which whole tiles of any
    # size hold.  On this thin hollow shell the rule stops at different ladder steps across the map, so
    # a d₀ estimated per tile (whose size follows chunk_rays) changed ray counts and values here.
    mesh = shapes.hollow_shell().mesh
    a = thickbake.bake(mesh, size=96, rays=64, seed=7, target_error=0.005)
    b = thickbake.bake(mesh, size=96, rays=64, seed=7, target_error=0.005, chunk_rays=1 << 12, threads=1,
                       order="rows")
    assert len(np.unique(a.rays[a.covered])) > 2          # the rule stops at several ladder steps here
    assert np.array_equal(a.rays, b.rays)
    assert np.array_equal(a.values, b.values) and np.array_equal(a.stderr, b.stderr)
