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

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def sphere():
    return shapes.sphere(radius=1.0)


def test_adaptive_meets_target_on_sphere(sphere):
    # sphere R = 1, cosine lobe: chord 2R cosθ has mean 4R/3 and per-ray σ = R·√(2 − 16/9) = 0.471
    # (chord ℓ = 2R cosθ has density ℓ/(2R²) on [0, 2R] under the cosine lobe, so E[ℓ²] = 2R²).  A standard error of E needs n ≥ (σ/E)² rays
    # by the independent-sampling formula the stopping rule uses; batches double from 16, so with
    # E = 0.05 (n ≥ 89) every texel stops at 128 of the 256-ray cap.
    target, cap = 0.05, 256
    adaptive = thickbake.bake(sphere.mesh, size=64, rays=cap, target_error=target)
    rays = adaptive.rays[adaptive.covered]
    sigma = math.sqrt(2 - 16 / 9)
    assert rays.min() >= (sigma / target) ** 2
    assert (rays == 128).mean() > 0.99
    # texels that stopped early report a standard error within the target ...
    early = rays < cap
    assert (adaptive.stderr[adaptive.covered][early] <= target).all()
    # ... and their actual error against the closed form meets it (RMS ≤ E; Sobol does far better)
    err = adaptive.values[adaptive.covered] - 4 / 3
    assert math.sqrt(np.mean(err ** 2)) <= target
    assert adaptive.info["rays_saved"] == pytest.approx(0.5 * (adaptive.info["rays_saved"] + adaptive.info["rays_traced"]), rel=0.02)
    # the rays are a prefix of the same low-discrepancy sequence: identical to a fixed 128-ray bake
    fixed = thickbake.bake(sphere.mesh, size=64, rays=128)
    same = rays == 128
    assert np.array_equal(fixed.values[fixed.covered][same], adaptive.values[adaptive.covered][same])


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
    for label in ("B/A", "B/C", "B(all)/B(1)", "Sobol", "adaptive", "Z order"):
        assert label in proc.stdout
    figures = json.loads(out.read_text())
    assert figures["throughput"]["rays"] > 0 and figures["noise"]["rms_sobol"] > 0
