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
    # sphere R = 1, cosine lobe, closed form 4R/3 (chord 2R cosθ averaged over the cosine lobe).
    # A texel stops once its replicate standard error and its 4x4 block's pooled one are both at most
    # E, so every texel that stopped before the cap reports σ̂ <= E; since the error bars are
    # calibrated (tests/test_error_bars.py), the RMS of the actual errors is then at most E, up to the
    # sampling spread of an RMS over n ≈ 2,700 texels (relative sd sqrt(1/(2n)) ≈ 1.4%; 4 sd = 6%).
    target, cap = 0.03, 256
    adaptive = thickbake.bake(sphere.mesh, size=64, rays=cap, target_error=target)
    rays = adaptive.rays[adaptive.covered]
    early = rays < cap
    assert early.mean() > 0.99
    assert (adaptive.stderr[adaptive.covered][early] <= target).all()
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
