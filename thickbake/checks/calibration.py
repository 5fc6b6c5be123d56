"""Calibration of the per-texel error bars: do the stated intervals cover the truth as often as they claim?

A bake reports, per texel, an estimate x̂, a standard error σ̃ — its R = 4 replicates' standard error
moderated with its neighbours' (:func:`thickbake.pipeline.measures.moderated_stderr_map`) — and the
degrees of freedom of σ̃ (``BakeResult.stderr_dof``, d₀ᵢ + R − 1).  The stated intervals are x̂ ± k·σ̃ with
k the Student-t quantile on those degrees of freedom
(:func:`thickbake.pipeline.measures.dof_coverage_factor`): 2.01 for "95%" and 1.01 for "68.3%" ("one
standard error" of a normal estimate) where a texel's 4×4 block shares one variance (48 dof), up to
3.18 and 1.20 for a texel without neighbours (3 dof).  Calibration is the share of covered texels whose
actual error lies inside each band; a calibrated bake gives 0.95 and 0.683.

Two kinds of truth:

* **closed form** — the sphere seen through a cone (:func:`thickbake.checks.error_budget.sphere_cone_expected`),
  baked on a finely tessellated sphere so that the facet error (a systematic error the error bars do
  not describe) stays a small fraction of σ̂;
* **reference bake** — any mesh, against a bake of the same mesh with 32× the rays and another seed.
  Facet and bias errors are shared and cancel; the reference's own error adds at most 1/32 of the
  variance (its error is at most 1/√32 of the bake's when the error falls as n^(−1/2), less for a net),
  which lowers the measured shares by at most about half a percentage point.

A share measured over n texels has the binomial standard deviation sqrt(p(1 − p)/n) (texels have
independent randomisations).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np

#: Nominal two-sided levels of the two bands: 95% and the normal ±1σ level, Φ(1) − Φ(−1).
LEVEL_95 = 0.95
LEVEL_1SIGMA = math.erf(1 / math.sqrt(2))
#: Rays of the reference bake relative to the bake being calibrated.
REFERENCE_FACTOR = 32
#: Longitude segments of the calibration sphere: facet error 2R(1 − cos(π/384)) = 6.7e-5 R, under a
#: tenth of σ̂ in every configuration of the table (σ̂ ≥ 8e-4 R at 256 rays, cone 30°).
FINE_SPHERE_SEGMENTS = 384


@dataclass
class CalibrationRow:
    """Coverage of the stated bands for one body and one setting.

    Attributes
    ----------
    body, truth : str
    rays : int
    lobe : str
    cone : float
    texels : int
        Covered texels compared.
    share_95, share_1sigma : float
        Share of texels whose |error| ≤ k95·σ̃ and ≤ k68·σ̃.
    k95, k1sigma : float
        Median over the texels of the coverage factors used (Student-t on each texel's dof).
    dof_median : float
        Median degrees of freedom of σ̃.
    prior_dof : float or None
        The bake's d₀ (None: unbounded, neighbours share one variance).
    binomial_sd_95, binomial_sd_1sigma : float
        sqrt(p(1 − p)/n) at the nominal p.
    rms_error, rms_stderr : float
        RMS of the actual errors and of the reported σ̂ (measure units).
    """

    body: str
    truth: str
    rays: int
    lobe: str
    cone: float
    texels: int
    share_95: float
    share_1sigma: float
    k95: float
    k1sigma: float
    binomial_sd_95: float
    binomial_sd_1sigma: float
    rms_error: float
    rms_stderr: float
    dof_median: float = 3.0
    prior_dof: float | None = None

    def to_dict(self) -> dict:
        return asdict(self)


def band_shares(error: np.ndarray, stderr: np.ndarray, dof) -> tuple[float, float, float, float]:
    """Shares of texels inside the 95% and 68.3% bands.

    Parameters
    ----------
    error : (n,) float
        Actual error of each texel (measure units).
    stderr : (n,) float
        Reported standard error of each texel (measure units).
    dof : float or (n,) float
        Degrees of freedom of each standard error (``BakeResult.stderr_dof``).

    Returns
    -------
    share_95, share_1sigma, k95, k1sigma : float
        The k are the medians of the per-texel factors.
    """
    from thickbake.pipeline.measures import dof_coverage_factor

    k95 = np.broadcast_to(dof_coverage_factor(LEVEL_95, dof), np.shape(error))
    k1 = np.broadcast_to(dof_coverage_factor(LEVEL_1SIGMA, dof), np.shape(error))
    z = np.abs(np.asarray(error, np.float64))
    s = np.asarray(stderr, np.float64)
    return float(np.mean(z <= k95 * s)), float(np.mean(z <= k1 * s)), float(np.median(k95)), float(np.median(k1))


def calibrate(body: str, mesh, rays: int, lobe: str, cone: float, *, size: int = 64, expected: float | None = None,
              seed: int = 0, reference_seed: int = 12345, threads: int | None = None) -> CalibrationRow:
    """Bake ``mesh`` and measure the coverage of its error bars.

    Parameters
    ----------
    body : str
        Label.
    mesh
        Anything :func:`thickbake.bake` accepts.
    rays, lobe, cone
        Bake settings (thickness measure, reach = bounding-box diagonal).
    size : int
        Map side in texels.
    expected : float, optional
        Closed-form value of every texel; without it the truth is a bake with
        :data:`REFERENCE_FACTOR` × ``rays`` and ``reference_seed``.
    """
    from thickbake.pipeline.driver import bake

    options = dict(size=size, lobe=lobe, cone=cone)
    if threads:
        options["threads"] = threads
    result = bake(mesh, rays=rays, seed=seed, **options)
    cov = result.covered
    if expected is None:
        reference = bake(mesh, rays=rays * REFERENCE_FACTOR, seed=reference_seed, **options)
        cov = cov & reference.covered
        truth_values = reference.values[cov].astype(np.float64)
        truth = f"bake with {REFERENCE_FACTOR}x rays"
    else:
        truth_values = float(expected)
        truth = "closed form"
    error = result.values[cov].astype(np.float64) - truth_values
    stderr = result.stderr[cov].astype(np.float64)
    dof = result.stderr_dof[cov].astype(np.float64)
    share95, share1, k95, k1 = band_shares(error, stderr, dof)
    n = int(cov.sum())
    return CalibrationRow(body=body, truth=truth, rays=rays, lobe=lobe, cone=float(cone), texels=n,
                          share_95=share95, share_1sigma=share1, k95=k95, k1sigma=k1,
                          binomial_sd_95=math.sqrt(LEVEL_95 * (1 - LEVEL_95) / n),
                          binomial_sd_1sigma=math.sqrt(LEVEL_1SIGMA * (1 - LEVEL_1SIGMA) / n),
                          rms_error=float(np.sqrt(np.mean(error ** 2))), rms_stderr=float(np.sqrt(np.mean(stderr ** 2))),
                          dof_median=float(np.median(dof)), prior_dof=result.info["stderr_dof"]["prior"])


def fine_sphere(radius: float = 1.0):
    """The calibration sphere (:data:`FINE_SPHERE_SEGMENTS`)."""
    from thickbake.checks import shapes

    return shapes.sphere(radius=radius, segments=FINE_SPHERE_SEGMENTS)


def sphere_expected(radius: float, cone: float, lobe: str, reach: float) -> float:
    """Closed-form mean chord of the sphere through the cone (thickness, scene units)."""
    from thickbake.checks.error_budget import sphere_cone_expected

    return sphere_cone_expected(radius, math.radians(cone), lobe, "thickness", reach)


def calibration_table(rays_list=(16, 64, 256), lobes=("cosine", "uniform"), cones=(30.0, 90.0), *, size: int = 64,
                      thin_thick_size: int = 48, progress=None) -> list[CalibrationRow]:
    """The calibration table: the fine sphere against its closed form, and the shell-and-ball body against
    a 32×-ray reference, for every combination of rays, lobe and cone."""
    from thickbake.checks import shapes
    from thickbake.pipeline.load import load_asset

    sphere = fine_sphere(1.0)
    sphere_asset = load_asset(sphere.mesh, name="sphere")
    body = shapes.shell_and_ball(wall_thickness=0.02, ball_radius=0.5)
    body_asset = load_asset(body.mesh, name="shell_and_ball")
    rows = []
    for rays in rays_list:
        for lobe in lobes:
            for cone in cones:
                expected = sphere_expected(1.0, cone, lobe, sphere_asset.diagonal)
                rows.append(calibrate("sphere (384 segments)", sphere_asset, rays, lobe, cone, size=size,
                                      expected=expected))
                if progress:
                    progress(rows[-1])
                rows.append(calibrate("shell + ball", body_asset, rays, lobe, cone, size=thin_thick_size))
                if progress:
                    progress(rows[-1])
    return rows


def table_lines(rows: list[CalibrationRow]) -> list[str]:
    """The calibration table as text lines (one row per body and setting, the targets in the header)."""
    out = [f"{'body':<22} {'truth':<18} {'rays':>5} {'lobe':<8} {'cone':>5} {'texels':>6}  {'in 95% band':>11} "
           f"{'in 68.3% band':>13}  {'RMS error':>9} {'RMS σ̃':>9} {'d₀':>6} {'dof':>5}"]
    for r in rows:
        flag95 = "" if abs(r.share_95 - LEVEL_95) <= 0.03 else " *"
        flag68 = "" if abs(r.share_1sigma - LEVEL_1SIGMA) <= 0.05 else " *"
        prior = "inf" if r.prior_dof is None else f"{r.prior_dof:.3g}"
        out.append(f"{r.body:<22} {r.truth:<18} {r.rays:>5} {r.lobe:<8} {r.cone:>5g} {r.texels:>6}  "
                   f"{r.share_95:>9.3f}{flag95:<2} {r.share_1sigma:>11.3f}{flag68:<2}  {r.rms_error:>9.3g} "
                   f"{r.rms_stderr:>9.3g} {prior:>6} {r.dof_median:>5.3g}")
    if rows:
        r = rows[0]
        out.append("bands: ±t·σ̃ on each texel's degrees of freedom (d₀ᵢ + 3; median column dof, e.g. "
                   f"±{r.k95:.2f}σ̃ and ±{r.k1sigma:.2f}σ̃ at {r.dof_median:.3g} dof); d₀ = the bake's prior degrees of "
                   "freedom (Smyth 2004); * = outside 0.95 ± 0.03 or 0.683 ± 0.05; binomial sd of a share over n "
                   f"texels: sqrt(p(1 − p)/n), e.g. {r.binomial_sd_95:.3f} at n = {r.texels}")
    return out


__all__ = ["table_lines", "LEVEL_95", "LEVEL_1SIGMA", "REFERENCE_FACTOR", "FINE_SPHERE_SEGMENTS", "CalibrationRow", "band_shares",
           "calibrate", "fine_sphere", "sphere_expected", "calibration_table"]
