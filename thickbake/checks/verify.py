"""``thickbake verify``: check bake settings against closed forms, or check an asset before baking it.

Without a mesh
--------------
``thickbake verify [--shapes NAMES] [--json FILE] [bake options]`` bakes every analytic shape of
:mod:`thickbake.shapes` with the given options and compares the result with what is known exactly.
Defaults of this command (any bake option overrides them): **--size 256 --rays 64**, everything
else at the bake defaults (cone 90°, cosine lobe, thickness, reach = bounding-box diagonal, 16-bit).
Values are compared as stored: the 16-bit (or 8-bit) codes are decoded back to measure units.

Checks, one table row each:

* **per texel, sphere** — any cone, lobe and measure: at every covered texel the closed form of
  :mod:`thickbake.checks.error_budget` (sphere seen through a cone of half-angle α, reach clipping included):

  - thickness, cosine lobe: 4R(1 − c³) / (3 sin²α), uniform lobe: R(1 + c), c = cos α;
  - transmittance (τ = 2R/L): cosine 2e^(−τc)[c·g₁(τ(1−c)) + (1−c)·g₂(τ(1−c))] / (1 + c),
    uniform e^(−τc)·g₁(τ(1−c)), g₁(y) = (1 − e^(−y))/y, g₂(y) = (1 − e^(−y)(1 + y))/y²;
  - occlusion: the share of the lobe whose chord 2R·cos θ is shorter than the reach.

  Derivation: a ray at angle θ from the inward normal of a sphere travels 2R·cos θ; with
  x = cos θ and dΩ = dx dφ, x has density 2x / (1 − c²) on [c, 1] under the cosine lobe and is
  uniform on [c, 1] under the uniform lobe; integrate the measure of 2R·x against that density.
* **per texel, along the normal** — torus, box, capped cylinder, hollow shell, L-block, only with
  ``--cone 0``: the exact chord of the ideal solid from the texel's own surface sample, along the
  bake's own ray direction (:meth:`thickbake.shapes.Shape.normal_chord`).  Texels whose chord jumps
  within the sample-position uncertainty (a ray grazing a face of the L-block) are not compared
  and are counted.
* **Cauchy mean chord 4V/S** — every shape, only for cone 90°, cosine lobe, thickness and a reach
  no shorter than the bounding-box diagonal (otherwise the row is *skipped*, not failed): the
  area-weighted mean of the texel values (weights ``BakeResult.area``) must equal 4V/S of the traced
  polyhedron (Cauchy 1832; Santaló 1976; for non-convex bodies with every chord segment counted,
  Mazzolo, Roesslinger & Gille 2003, from memory).  The theorem weights directions by the cosine to
  the *geometric* normal, so this row bakes a flat-shaded copy of the shape (each triangle's own
  normal as the lobe axis); smooth shading would tilt the lobe by up to half a facet angle.

Tolerances (all derived, see :mod:`thickbake.checks.error_budget`):

* per texel, every texel: |error| ≤ systematic + k·σ_pool, σ_pool the RMS over the compared texels of
  the bake's standard-error map (moderated replicate standard errors, :mod:`thickbake.pipeline.measures`;
  the sphere's texels share one σ by symmetry), k the Student-t quantile for n·(R − 1) degrees of freedom at
  two-sided level 10⁻³/n (Bonferroni over the n texels): about 5.7σ_pool at 65,536 texels;
* per texel, 95% of texels: |error| ≤ systematic + t·σ̃ (each texel's calibrated 95% band: Student-t on
  the moderated standard error's own degrees of freedom, ``BakeResult.stderr_dof`` — 2.01σ̃ at 48 dof
  where a 4×4 block shares one variance, up to 3.18σ̃ at 3 dof) for all but 5% + 0.03 (calibration
  slack) + 4 binomial sd of the texels;
* systematic = facet + bias + float32 + ½ code step.  Sphere: the lobe average of
  e(x) = min((2δ + b(1 − x²))/x, 2Rx + √(2R(δ + b)) + b) (δ = facet bound, b = bias; first order
  in δ/R, crude bound near grazing) plus a shading-normal tilt term 2R·sin ε.  Along the normal:
  δ / cos(exit angle) (the ray is the bake's own, so the bias is exact).  float32: 8 ulps of the
  bounding-box diagonal.  Quantisation: half a code step, reach / (2·(2^bits − 1)) for thickness;
* Cauchy: 4σ of the weighted mean (σ² = Σ aᵢ²σᵢ² / (Σ aᵢ)²) + quadrature (the bake's midpoint
  weights against the exact texel coverage, by clipping every UV triangle against every texel:
  ½‖p − q‖₁ times the value range or Σ|aᵢ − wᵢ||vᵢ − M_w|/Σa, whichever is smaller, plus the
  sample-to-patch-centroid distance times an average Lipschitz constant 3) + bias 8b/3 + float32
  + ½ step, capped at the 1% budget the baker's acceptance criterion sets for this check.

Exit status 0 when every row passes or is skipped, 1 otherwise.  ``--json FILE`` writes the table.

With a mesh
-----------
``thickbake verify MESH [bake options]`` checks that an asset is fit for baking: closed after
welding seams (open edges and their length; edges shared by more than two faces), every face wound
outward (faces against their neighbours and inside-out parts, by a spanning-tree assignment and ray
parity, see :mod:`thickbake.meshcheck`), inward rays that meet a front face or escape, UV coverage,
overlap and texel-density spread, and Cauchy's mean chord: one bake at the given size/rays/seed with
cone 90°, cosine lobe, thickness, reach = diagonal and flat shading (your --cone, --lobe, --measure,
--reach and --invert do not apply to that row).  A mismatch there, like a hole or an inside-out part,
means some inward rays do not measure the solid.  Every failed row says what to do; the last line is
the verdict, "fit for baking" or "not fit for baking: …".
"""

from __future__ import annotations

import math
import time
from dataclasses import asdict, dataclass, field, replace

import numpy as np

from thickbake.constants import REACH_DIAGONAL_RELATIVE_SLACK
from thickbake.errors import ThickbakeError
from thickbake.measures import measure_named

#: Options of ``thickbake verify`` when the user gives none: small enough for a two-core machine to
#: check every shape in well under two minutes, large enough for thousands of texels per shape.
VERIFY_DEFAULTS = {"size": 256, "rays": 64}
#: Judgement thresholds of the asset checks (not derived bounds): on a clean closed outward mesh no
#: inward ray meets a front face or escapes (none of 65,536 per analytic shape did); 0.1% leaves room
#: for rays that graze an edge.
FRONT_HIT_LIMIT = 1e-3
ESCAPE_LIMIT = 1e-3
#: Rays cast by the front-face/escape test.
INWARD_TEST_RAYS = 1 << 16
#: Texel-density spread (p95 / p5 of world area per texel) above which a warning is given: 4 means
#: texels differ by 2x in edge length.  Common practice, no published source.
DENSITY_SPREAD_WARN = 4.0
#: Share of the surface that may lack texels before the mean-chord check is not applicable.
UNSAMPLED_LIMIT = 1e-3
#: Share of covered texels claimed twice above which UV overlap is a warning (judgement): a unique
#: layout can still show a few double claims where a texel centre falls exactly on a shared UV edge.
OVERLAP_WARN = 1e-3

PASS, FAIL, SKIP, WARN, INFO = "PASS", "FAIL", "skip", "warn", "info"


@dataclass
class Check:
    """One row of the verify table.

    Attributes
    ----------
    subject : str
        Shape name or file name.
    quantity : str
        What is checked.
    status : {"PASS", "FAIL", "skip", "warn", "info"}
    expected, measured : float or None
        Measure units (mean over texels for per-texel rows).
    p95, max : float or None
        95th percentile and largest absolute error over the compared texels (measure units).
    tolerance : float or None
        The largest per-texel bound (per-texel rows) or the tolerance of the mean.
    basis : str
        How the tolerance was derived, with its terms.
    note : str
        Why a row was skipped, what a failure points to and what to do, or the figure itself.
    figures : dict
        Everything else worth keeping in the JSON.
    """

    subject: str
    quantity: str
    status: str
    expected: float | None = None
    measured: float | None = None
    p95: float | None = None
    max: float | None = None
    tolerance: float | None = None
    basis: str = ""
    note: str = ""
    figures: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return _json_safe(asdict(self))


@dataclass
class VerifyReport:
    """All rows of one ``verify`` run."""

    mode: str                     # "shapes" or "asset"
    header: list
    checks: list
    settings: dict
    seconds: float = 0.0
    verdict: str = ""

    @property
    def passed(self) -> bool:
        return not any(c.status == FAIL for c in self.checks)

    def to_dict(self) -> dict:
        return _json_safe({"mode": self.mode, "passed": self.passed, "verdict": self.verdict,
                           "seconds": round(self.seconds, 3), "settings": self.settings, "header": self.header,
                           "checks": [c.to_dict() for c in self.checks]})

    def lines(self) -> list[str]:
        out = list(self.header)
        cols = f"{'subject':<16} {'check':<30} {'expected':>10} {'measured':>10} {'p95 |err|':>10} " \
               f"{'max |err|':>10} {'tolerance':>10}  result"
        out += [cols, "-" * len(cols)]
        for c in self.checks:
            out.append(f"{c.subject[:16]:<16} {c.quantity[:30]:<30} {_num(c.expected):>10} {_num(c.measured):>10} "
                       f"{_num(c.p95):>10} {_num(c.max):>10} {_num(c.tolerance):>10}  {c.status}")
            if c.basis:
                out.append(f"{'':<17}tolerance: {c.basis}")
            if c.note:
                out.append(f"{'':<17}{'why: ' if c.status == FAIL else ''}{c.note}")
        out.append(self.verdict)
        return out


def _num(value) -> str:
    if value is None:
        return "-"
    if not math.isfinite(value):
        return str(value)
    return f"{value:.6g}" if abs(value) >= 1e-3 or value == 0 else f"{value:.3g}"


def _json_safe(obj):
    if isinstance(obj, dict):
        return {str(k): _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_safe(v) for v in obj]
    if isinstance(obj, (np.floating, float)):
        return float(obj) if math.isfinite(obj) else None
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj


# ---------------------------------------------------------------------------- shared helpers
def _settings(options: dict | None, where: str):
    """(BakeSettings, RunOptions) from the user's options over :data:`VERIFY_DEFAULTS`."""
    from thickbake.settings import settings_from_mapping

    merged = dict(VERIFY_DEFAULTS)
    merged.update(options or {})
    return settings_from_mapping(merged, where=where)


def _decoded(result) -> np.ndarray:
    """(h·w,) float64 texel values as stored in the image and decoded through the sidecar formula."""
    from thickbake.maps.sidecar import Encoding

    s = result.settings
    encoding = Encoding.of(".png", s.measure, s.reach, s.invert, s.bits)
    return encoding.decode(result.codes(), "(the map in memory)").ravel()


def _flat_shaded(asset):
    """The asset with every corner normal replaced by its triangle's geometric normal."""
    return replace(asset, triangle_normals=np.repeat(asset.face_normals[:, None, :], 3, axis=1))


def _is_flat(asset) -> bool:
    return bool(np.allclose(asset.triangle_normals, asset.face_normals[:, None, :], atol=1e-12))


def _dof(settings) -> int:
    """Degrees of freedom of each texel's standard error: R − 1 replicates (0 for one ray per sample)."""
    from thickbake.pipeline.directions import rays_per_sample, replicate_count

    if settings.cone == 0:
        return 0
    return replicate_count(rays_per_sample(settings.rays)) - 1


def _settings_line(s) -> str:
    measure = measure_named(s.measure)
    units = f" ({measure.unit_label})" if measure.unit_label else ""
    extra = f", attenuation distance {s.attenuation_distance:g}" if measure.uses_attenuation else ""
    return (f"{s.width}x{s.height} texels, {s.rays} rays{' (cap, adaptive)' if s.target_error else ''}, "
            f"cone {s.cone:g}°, {s.lobe} lobe, {s.measure}{units}{extra}, {s.sequence} directions, "
            f"supersample {s.supersample}, {s.bits}-bit codes")


# ---------------------------------------------------------------------------- per-texel rows
def _per_texel_row(subject: str, quantity: str, result, expected_t: np.ndarray, systematic_t: np.ndarray,
                   excluded_t: np.ndarray, sys_terms: str, settings, extra_note: str = "") -> Check:
    """Compare a map texel by texel with expected values and systematic bounds (all (h·w,))."""
    from thickbake.checks.error_budget import CALIBRATION_SLACK, FAMILY_ALPHA, LEVEL_95, bonferroni_k
    from thickbake.pipeline.measures import dof_coverage_factor

    covered = result.covered.ravel()
    use = covered & ~excluded_t
    n = int(use.sum())
    if n == 0:
        return Check(subject, quantity, SKIP, note="no texel could be compared")
    measured = _decoded(result)[use]
    expected = expected_t[use]
    sigma = result.stderr.ravel().astype(np.float64)[use]
    systematic = systematic_t[use]
    error = np.abs(measured - expected)
    dof = _dof(settings)
    # every texel: one σ pooled over the compared texels (n·(R − 1) degrees of freedom; on the sphere
    # every texel sees the same integrand by symmetry, so they share one σ) at the Bonferroni level
    sigma_pool = float(np.sqrt(np.mean(sigma * sigma))) if dof >= 1 else 0.0
    k_max = bonferroni_k(n, n * dof, FAMILY_ALPHA)
    bound_max = systematic + k_max * sigma_pool
    # 95% of texels: each texel's own calibrated 95% band (Student-t on its moderated σ̃'s dof)
    texel_dof = (result.stderr_dof.ravel().astype(np.float64)[use] if result.stderr_dof is not None
                 else np.full(n, float(dof)))
    k95_t = dof_coverage_factor(LEVEL_95, texel_dof) if dof >= 1 else np.zeros(n)
    k95 = float(np.median(k95_t))
    bound_95 = systematic + k95_t * sigma
    allowed_95 = (1 - LEVEL_95) + CALIBRATION_SLACK + 4 * math.sqrt(LEVEL_95 * (1 - LEVEL_95) / n)
    over_max = error > bound_max
    share_95 = float(np.mean(error > bound_95))
    ok = not over_max.any() and share_95 <= allowed_95
    if dof >= 1:
        stat = (f"{k_max:.2f}σ_pool every texel (σ_pool {sigma_pool:.3g}: RMS of the texels' moderated standard "
                f"errors, {n * dof:,} dof; Bonferroni over {n:,} texels, family-wise {FAMILY_ALPHA:g}) and the "
                f"calibrated 95% band t·σ̃ (Student-t on each texel's moderated dof, median {k95:.2f}σ̃ at "
                f"{float(np.median(texel_dof)):.3g} dof) for all but {allowed_95:.1%} of texels "
                f"(5% + calibration slack {CALIBRATION_SLACK:g} + 4 binomial sd)")
    else:
        stat = "no statistical term (one ray per sample" + (", deterministic)" if settings.cone == 0 else ")")
    basis = f"{stat}; + systematic {sys_terms}"
    notes = []
    if excluded_t[covered].any():
        notes.append(f"{int((excluded_t & covered).sum()):,} texels on a jump of the closed form not compared")
    if extra_note:
        notes.append(extra_note)
    if not ok:
        ratio = error / np.maximum(bound_max, 1e-300)
        worst = int(np.argmax(ratio))
        texel = int(np.flatnonzero(use)[worst])
        w = result.settings.width
        notes.append(f"{int(over_max.sum()):,} texels beyond their bound, {share_95:.1%} beyond the 95% bound; "
                     f"worst texel row {texel // w}, col {texel % w}: measured {measured[worst]:.6g}, "
                     f"expected {expected[worst]:.6g}, bound {bound_max[worst]:.3g}")
        notes.append(_per_texel_hint(settings, float(np.mean(measured - expected))))
    return Check(subject, quantity, PASS if ok else FAIL, expected=float(expected.mean()),
                 measured=float(measured.mean()), p95=float(np.percentile(error, 95)), max=float(error.max()),
                 tolerance=float(bound_max.max()), basis=basis, note="; ".join(notes),
                 figures={"texels": n, "share_beyond_95_bound": share_95, "texels_beyond_bound": int(over_max.sum()),
                          "coverage_factor_every": k_max, "coverage_factor_95": k95, "dof": dof,
                          "allowed_share_beyond_95": allowed_95, "sigma_pool": sigma_pool,
                          "sigma_p50": float(np.median(sigma)), "systematic_max": float(systematic.max())})


def _per_texel_hint(settings, mean_error: float) -> str:
    hints = []
    if settings.bias == 0:
        hints.append("bias 0 lets rays hit the triangle they start on (chords near 0): keep the default "
                     "--bias or give a positive one")
    if settings.cone > 0 and _dof(settings) < 1:
        hints.append("with one ray per sample the bake cannot estimate its noise, so the map carries no "
                     "error bars: use --rays 16 or more")
    if not hints:
        direction = "short" if mean_error < 0 else "long"
        hints.append(f"the map reads {direction} on average by {abs(mean_error):.3g}: a systematic error in "
                     "the bake at these settings")
    return "; ".join(hints)


def _sphere_row(shape, asset, result) -> Check:
    from thickbake.checks.coverage import texel_samples
    from thickbake.checks.error_budget import (float32_term, half_code_step, measure_lipschitz, sphere_cone_expected,
                            sphere_systematic_bound)

    s = result.settings
    R = float(shape.params["radius"])
    alpha = math.radians(s.cone)
    expected = sphere_cone_expected(R, alpha, s.lobe, s.measure, s.reach, s.attenuation_distance)
    facet = float(shape.facet_error)
    fb = sphere_systematic_bound(R, alpha, s.lobe, s.measure, s.reach, s.attenuation_distance, facet, s.bias)
    ts = texel_samples(asset, s.width, s.height, s.supersample, s.bias)
    radial = ts.positions / np.linalg.norm(ts.positions, axis=1, keepdims=True)
    tilt = np.arccos(np.clip(np.einsum("ij,ij->i", radial, ts.normals), -1.0, 1.0))
    lip = measure_lipschitz(s.measure, s.attenuation_distance) or 0.0
    tilt_t = ts.texel_mean(lip * 2.0 * R * np.sin(tilt))
    fl = lip * float32_term(asset.diagonal)
    q = half_code_step(s.measure, s.reach, s.bits)
    size = s.width * s.height
    systematic = fb + tilt_t + fl + q
    terms = (f"facet+bias {fb:.3g} (δ={facet:.3g}, b={s.bias:.3g}) + tilt ≤{tilt_t.max():.2g} + float32 {fl:.2g} "
             f"+ ½ step {q:.2g}")
    return _per_texel_row(shape.name, f"per texel, cone closed form", result, np.full(size, expected), systematic,
                          np.zeros(size, bool), terms, s)


def _normal_row(shape, asset, result) -> Check:
    from thickbake.checks.coverage import texel_samples
    from thickbake.checks.error_budget import float32_term, half_code_step, measure_modulus, measure_value

    s = result.settings
    ts = texel_samples(asset, s.width, s.height, s.supersample, s.bias)
    p, n = ts.positions, ts.normals
    chord = shape.normal_chord(p, n)
    exit_point = p - np.nan_to_num(chord)[:, None] * n
    exit_normal = shape.surface_normal(exit_point)
    exit_cos = np.abs(np.einsum("ij,ij->i", exit_normal, n))
    facet = float(shape.facet_error)
    fl = float32_term(asset.diagonal)
    chord_error = facet / np.maximum(exit_cos, 1e-6) + fl
    # a jump of the closed form within the sample-position uncertainty makes the texel ambiguous
    eta = max(s.bias, fl)
    tangent = np.cross(n, np.where(np.abs(n[:, :1]) < 0.9, [[1.0, 0, 0]], [[0, 1.0, 0]]))
    tangent /= np.linalg.norm(tangent, axis=1, keepdims=True)
    bitangent = np.cross(n, tangent)
    jump = ~np.isfinite(chord)
    for offset in (tangent, -tangent, bitangent, -bitangent):
        nearby = shape.normal_chord(p + eta * offset, n)
        jump |= ~np.isfinite(nearby) | (np.abs(nearby - chord) > 2 * chord_error + 2 * eta)
    chord = np.where(jump, 0.0, chord)
    value = measure_value(chord, s.measure, s.reach, s.attenuation_distance)
    modulus = measure_modulus(chord, chord_error, s.measure, s.reach, s.attenuation_distance)
    q = half_code_step(s.measure, s.reach, s.bits)
    excluded = ts.texel_mean(jump.astype(np.float64)) > 0
    terms = (f"facet δ/cos(exit) ≤{float(modulus[~jump].max()) if (~jump).any() else 0:.3g} (δ={facet:.3g}) "
             f"+ float32 {fl:.2g} + ½ step {q:.2g}; bias exact along the normal")
    return _per_texel_row(shape.name, "per texel, along the normal", result, ts.texel_mean(value),
                          ts.texel_mean(modulus) + q, excluded, terms, s)


# ---------------------------------------------------------------------------- Cauchy row
def cauchy_not_applicable(settings, diagonal: float) -> str | None:
    """Why the mean-chord theorem does not apply to a bake with these settings (None if it does)."""
    reasons = []
    if settings.cone != 90:
        reasons.append(f"cone {settings.cone:g}° (needs 90)")
    if settings.lobe != "cosine":
        reasons.append(f"{settings.lobe} lobe (needs cosine)")
    if settings.measure != "thickness":
        reasons.append(f"measure {settings.measure} (needs thickness)")
    if settings.reach < diagonal * (1 - REACH_DIAGONAL_RELATIVE_SLACK):
        reasons.append(f"reach {settings.reach:g} shorter than the diagonal {diagonal:g} may clip chords")
    return "; ".join(reasons) or None


def _mean_chord_row(subject: str, asset, result, expected: float, capped: bool) -> Check:
    from thickbake.checks.coverage import exact_texel_coverage, texel_samples, weighted_mean_quadrature_bound
    from thickbake.checks.error_budget import (CAUCHY_BUDGET, CAUCHY_K, MEAN_CHORD_LIPSCHITZ, cauchy_bias_bound, float32_term,
                            half_code_step)

    s = result.settings
    values = _decoded(result)
    area = result.area.ravel().astype(np.float64)
    sigma = result.stderr.ravel().astype(np.float64)
    total = area.sum()
    measured = float((area * values).sum() / total)
    sigma_mean = float(np.sqrt((area * area * sigma * sigma).sum()) / total)
    sigma_source = "the stderr map"
    if _dof(s) < 1 and s.cone > 0:
        # one ray per sample: no stderr map; treat texel values as independent draws about the mean
        # (their spatial variation only inflates this, so it is conservative)
        sigma_mean = float(np.sqrt((area * area * (values - measured) ** 2).sum()) / total)
        sigma_source = "the spread of texel values (one ray per sample: no stderr map)"
    coverage = exact_texel_coverage(asset, s.width, s.height)
    ts = texel_samples(asset, s.width, s.height, s.supersample, s.bias)
    points = np.stack([ts.texel_mean(ts.positions[:, k]) for k in range(3)], axis=1)
    quad = weighted_mean_quadrature_bound(values, area, coverage, points, MEAN_CHORD_LIPSCHITZ)
    stat = CAUCHY_K * sigma_mean
    bias = cauchy_bias_bound(s.bias)
    fl = float32_term(asset.diagonal)
    q = half_code_step(s.measure, s.reach, s.bits)
    derived = stat + quad.total + bias + fl + q
    budget = CAUCHY_BUDGET * expected
    tolerance = min(derived, budget) if capped else derived
    error = abs(measured - expected)
    basis = (f"{CAUCHY_K:g}σ_mean {stat:.2g} (σ from {sigma_source}) + quadrature {quad.total:.2g} "
             f"(weights {quad.weights:.2g}, positions {quad.position:.2g}) + bias 8b/3 {bias:.2g} "
             f"+ float32 {fl:.1g} + ½ step {q:.1g} = {derived:.3g}")
    if capped:
        basis += f", capped at the 1% budget {budget:.3g}" if derived > budget else f" (1% budget {budget:.3g})"
    elif derived > budget:
        basis += f"; above 1% of 4V/S: use a larger --size or more --rays for a sharper check"
    status = PASS if error <= tolerance else FAIL
    return Check(subject, "Cauchy mean chord 4V/S", status, expected=expected, measured=measured, max=error,
                 tolerance=tolerance, basis=basis,
                 figures={"relative_error": (measured - expected) / expected, "sigma_mean": sigma_mean,
                          "quadrature_weights": quad.weights, "quadrature_positions": quad.position,
                          "bias_term": bias, "derived_tolerance": derived, "budget": budget,
                          "miss_fraction": result.info.get("miss_fraction"),
                          "area_sum_over_surface": float(total / max(coverage.area.sum(), 1e-300))})


# ---------------------------------------------------------------------------- analytic shapes
def _select_shapes(names: str | None):
    from thickbake.checks import shapes

    available = {s.name: s for s in shapes.analytic_set()}
    if not names:
        return list(available.values())
    wanted = [n.strip() for n in names.split(",") if n.strip()]
    extra = {"shell_and_ball": shapes.shell_and_ball}
    out = []
    for name in wanted:
        if name in available:
            out.append(available[name])
        elif name in extra:
            out.append(extra[name]())
        else:
            raise ThickbakeError(f"unknown shape {name!r} in --shapes",
                                 fix=f"choose from {', '.join(list(available) + list(extra))}")
    return out


def verify_shapes(options: dict | None = None, names: str | None = None) -> VerifyReport:
    """Bake the analytic shapes with ``options`` and compare with their closed forms.

    Parameters
    ----------
    options : dict, optional
        BakeSettings and RunOptions fields; missing ones take :data:`VERIFY_DEFAULTS`, then the bake defaults.
    names : str, optional
        Comma-separated subset of shapes.

    Returns
    -------
    VerifyReport
    """
    from thickbake.pipeline.driver import bake
    from thickbake.pipeline.load import load_asset

    start = time.perf_counter()
    settings, run = _settings(options, "verify options")
    shapes = _select_shapes(names)
    checks = []
    resolved = None
    for shape in shapes:
        asset = load_asset(shape.mesh, name=shape.name)
        s = settings.resolve(asset.diagonal)
        resolved = resolved or s
        result = None
        if shape.name == "sphere":
            result = bake(asset, settings, run)
            checks.append(_sphere_row(shape, asset, result))
        elif settings.cone == 0:
            result = bake(asset, settings, run)
            checks.append(_normal_row(shape, asset, result))
        else:
            checks.append(Check(shape.name, "per texel, along the normal", SKIP,
                                note="closed form only along the normal: run with --cone 0 "
                                     f"(cone is {settings.cone:g}°)"))
        why_not = cauchy_not_applicable(s, asset.diagonal)
        if why_not:
            checks.append(Check(shape.name, "Cauchy mean chord 4V/S", SKIP, note=f"not applicable: {why_not}"))
            continue
        if result is None or not _is_flat(asset):
            flat = _flat_shaded(asset)
            result = bake(flat, settings, run)
        else:
            flat = asset
        checks.append(_mean_chord_row(shape.name, flat, result, float(shape.cauchy_mean_chord), capped=True))
    failed = [c for c in checks if c.status == FAIL]
    header = [f"thickbake verify: {len(shapes)} analytic shapes, {_settings_line(resolved)}"]
    verdict = ("all checks passed" if not failed else
               f"{len(failed)} check{'s' if len(failed) > 1 else ''} failed: "
               + ", ".join(f"{c.subject} {c.quantity}" for c in failed))
    return VerifyReport("shapes", header, checks, resolved.to_dict() if resolved else {},
                        seconds=time.perf_counter() - start, verdict=verdict)


# ---------------------------------------------------------------------------- user assets
def verify_asset(source, options: dict | None = None) -> VerifyReport:
    """Check that an asset is fit for baking (see the module docstring).

    The rows, each built by its own function below: closed surface (:func:`_closed_surface_row`),
    faces wound outward (:func:`_orientation_row`), inward rays that meet a front face or escape
    (:func:`_inward_ray_rows`), UV coverage, overlap and texel density (:func:`_uv_rows`), and Cauchy's
    mean chord from one flat-shaded bake (:func:`_asset_mean_chord_row`); then the verdict
    (:func:`_asset_verdict`).

    Parameters
    ----------
    source : str, os.PathLike, trimesh.Trimesh or trimesh.Scene
    options : dict, optional
        BakeSettings and RunOptions fields; size, rays, seed, supersample, bias, sequence, bits and the run
        options apply;
        the mean-chord bake overrides cone, lobe, measure, reach and invert.

    Returns
    -------
    VerifyReport
        Mode ``"asset"``, one row per check, the settings of the mean-chord bake.
    """
    from thickbake.pipeline.driver import bake_maps
    from thickbake.checks.meshcheck import front_face_hits
    from thickbake.pipeline.load import load_asset
    from thickbake.pipeline.trace import make_engine

    start = time.perf_counter()
    asset = load_asset(source)
    rep = asset.report
    user, run = _settings(options, "verify options")
    overridden = [k for k in ("cone", "lobe", "measure", "reach", "invert", "attenuation_distance")
                  if options and k in options]
    settings = user.replace(cone=90.0, lobe="cosine", measure="thickness", reach=None, invert=False,
                            attenuation_distance=None)
    engine = make_engine(asset.trace_vertices, asset.trace_faces, closed=rep.watertight)
    checks = [_closed_surface_row(asset)]
    orientation = _orientation_row(asset, engine)
    checks.append(orientation)
    hits = front_face_hits(asset, engine, INWARD_TEST_RAYS, seed=user.seed)
    checks += _inward_ray_rows(asset.name, hits)

    flat = _flat_shaded(asset)
    maps = bake_maps(flat, settings, run, engine=engine)
    uv_rows, overlapping = _uv_rows(asset, maps)
    checks += uv_rows
    suspects = _mean_chord_suspects(rep, orientation.figures["wrong_faces"], hits, overlapping)
    checks.append(_asset_mean_chord_row(flat, maps, overridden, suspects))

    s = maps[0].settings
    header = [f"thickbake verify {asset.name}: {rep.faces:,} faces, {rep.vertices_merged:,} welded vertices, "
              f"volume {rep.volume:.6g}, area {rep.area:.6g}, diagonal {asset.diagonal:.6g} scene units",
              f"checks baked at {_settings_line(s)}"]
    return VerifyReport("asset", header, checks, s.to_dict(), seconds=time.perf_counter() - start,
                        verdict=_asset_verdict(checks))


def _closed_surface_row(asset) -> Check:
    """Open edges (and their length, scene units) and edges shared by more than two faces, after welding seams."""
    name, rep = asset.name, asset.report
    non_manifold = rep.non_manifold_edges
    if rep.boundary_edges == 0 and non_manifold == 0:
        return Check(name, "closed surface", PASS, measured=0.0, note="no open edges after welding seams")
    notes = []
    if rep.boundary_edges:
        notes.append(f"close the holes: {rep.boundary_edges:,} open edges, {rep.boundary_length:.4g} scene units "
                     f"long — rays that leave through them count as the full reach")
    if non_manifold:
        notes.append(f"{non_manifold:,} edges are shared by more than two faces: remove internal or "
                     "duplicated faces")
    return Check(name, "closed surface", FAIL, measured=float(rep.boundary_edges), note="; ".join(notes),
                 figures={"open_edges": rep.boundary_edges, "open_length": rep.boundary_length,
                          "non_manifold_edges": non_manifold})


def _orientation_row(asset, engine) -> Check:
    """Faces wound against their neighbours and inside-out parts (:func:`thickbake.checks.meshcheck.face_orientation`).

    Zero-area triangles have no orientation: load leaves them out of its checks, and so does verify
    (their own engine is built when there are any).  ``figures["wrong_faces"]`` counts the inward faces.
    """
    from thickbake.checks.meshcheck import face_orientation
    from thickbake.pipeline.trace import closed_surface, make_engine

    name, rep = asset.name, asset.report
    solid = asset.trace_faces if asset.face_degenerate is None else asset.trace_faces[~asset.face_degenerate]
    orient = face_orientation(asset.trace_vertices, solid, engine if len(solid) == len(asset.trace_faces)
                              else make_engine(asset.trace_vertices, solid, closed=closed_surface(solid)))
    wrong = len(orient.wrong_faces)
    figures = {"faces": orient.faces, "wrong_faces": wrong, "parts": orient.parts,
               "inside_out_parts": orient.inside_out_parts, "conflicts": orient.conflicts,
               "whole_mesh_reversed_on_load": rep.orientation_flipped, "volume": rep.volume}
    whole = (" The whole mesh was inside-out (negative volume); thickbake reversed it for the bake, but export it "
             "with outward normals for other tools." if rep.orientation_flipped else "")
    if wrong == 0 and orient.conflicts == 0:
        return Check(name, "faces wound outward", PASS, measured=0.0,
                     note=f"{orient.parts} part{'s' if orient.parts != 1 else ''}, every face outward.{whole}",
                     figures=figures)
    notes = [f"{wrong:,} of {orient.faces:,} faces ({orient.wrong_share:.2%}) point inward"]
    if orient.inside_out_parts:
        notes.append(f"{orient.inside_out_parts} whole part{'s are' if orient.inside_out_parts > 1 else ' is'} "
                     "inside-out")
    if orient.conflicts:
        notes.append(f"{orient.conflicts} adjacent pairs cannot be made consistent (non-orientable surface)")
    notes.append("recalculate normals outside / flip those faces in your modelling tool — rays from them go "
                 "outward and miss")
    return Check(name, "faces wound outward", FAIL, measured=float(wrong), note="; ".join(notes) + whole,
                 figures=figures)


def _inward_ray_rows(name: str, hits) -> list[Check]:
    """The two rows of the inward-ray test (:func:`thickbake.checks.meshcheck.front_face_hits`): shares
    of rays that meet a front face first, and of rays that escape."""
    figures = {"rays": hits.rays, "front": hits.front, "escaped": hits.missed}
    return [
        Check(name, "rays hitting a front face", PASS if hits.front_share <= FRONT_HIT_LIMIT else FAIL,
              measured=hits.front_share, tolerance=FRONT_HIT_LIMIT,
              basis="none on a clean closed outward mesh; 0.1% allowed for rays grazing edges (judgement)",
              note="" if hits.front_share <= FRONT_HIT_LIMIT else
              f"{hits.front:,} of {hits.rays:,} rays met a front face first: intersecting or overlapping "
              "parts, internal faces or inward-facing patches; separate or merge the intersecting parts "
              "and delete internal faces", figures=figures),
        Check(name, "rays escaping the solid", PASS if hits.missed_share <= ESCAPE_LIMIT else FAIL,
              measured=hits.missed_share, tolerance=ESCAPE_LIMIT,
              basis="none on a closed mesh; 0.1% allowed for rays slipping through edges (judgement)",
              note="" if hits.missed_share <= ESCAPE_LIMIT else
              f"{hits.missed:,} of {hits.rays:,} rays left the mesh without meeting it again: holes or "
              "faces pointing inward (see above)", figures=figures),
    ]


def _uv_rows(asset, maps) -> tuple[list[Check], bool]:
    """UV coverage (share of texels), overlap (share of covered texels claimed twice) and texel-density
    spread rows of the asset's maps, and whether the overlap is high enough to warn."""
    name, rep = asset.name, asset.report
    s = maps[0].settings
    coverage_share = float(np.mean([m.info["coverage"] for m in maps]))
    cov_note = f"{coverage_share:.1%} of the {s.width}x{s.height} texels are covered"
    if len(maps) > 1:
        cov_note += f" on average over the asset's {len(maps)} maps (one per material and UDIM tile)"
    uv_status = INFO
    if rep.faces_without_uv:
        uv_status = WARN
        cov_note += f"; {rep.faces_without_uv:,} faces have no UVs: they get no texels — unwrap them if they need a map"
    if rep.degenerate_faces:
        uv_status = WARN
        cov_note += (f"; {rep.degenerate_faces:,} degenerate (zero-area) triangles: delete them (merge vertices by "
                     "distance) and export again")
    rows = [Check(name, "UV coverage", uv_status, measured=coverage_share, note=cov_note)]
    overlap = float(max(m.info.get("overlap", 0.0) for m in maps))
    overlapping = overlap > OVERLAP_WARN
    rows.append(Check(name, "UV overlap", WARN if overlapping else INFO, measured=overlap, tolerance=OVERLAP_WARN,
                      note=(f"{overlap:.2%} of covered texels are claimed by more than one triangle (stacked or "
                            "mirrored islands): they average every surface mapped there — give parts of different "
                            "thickness their own UV space" if overlapping else
                            f"{overlap:.2%} of covered texels claimed twice")))
    rows.append(_density_row(name, maps))
    return rows, overlapping


def _density_row(name: str, maps) -> Check:
    """Texel-density spread: p95 / p5 of the world area per texel (scene units²).

    Density is judged within each map (maps of different materials are separate textures); the map
    with the widest spread speaks for the asset.
    """
    spreads = []
    for m in maps:
        per_texel = m.area[m.area > 0].astype(np.float64)
        q5, q95 = (np.percentile(per_texel, [5, 95]) if per_texel.size else (0.0, 0.0))
        spreads.append((q95 / q5 if q5 > 0 else math.inf, q5, q95))
    spread, p5, p95 = max(spreads, key=lambda x: x[0])
    return Check(name, "texel density spread p95/p5", WARN if spread > DENSITY_SPREAD_WARN else INFO,
                 measured=spread, tolerance=DENSITY_SPREAD_WARN,
                 note=(f"world area per texel p5 {p5:.3g}, p95 {p95:.3g} scene units²"
                       + (": texel size varies by more than 2x; even out the UV scale if detail matters "
                          "everywhere" if spread > DENSITY_SPREAD_WARN else "")),
                 figures={"area_p5": p5, "area_p95": p95})


def _mean_chord_suspects(rep, wrong_faces: int, hits, overlapping: bool) -> list[str]:
    """What the rows above found that would bend the mean chord, in the order the note names them."""
    suspects = []
    if rep.boundary_edges:
        suspects.append("holes")
    if wrong_faces:
        suspects.append("faces pointing inward")
    if hits.front_share > FRONT_HIT_LIMIT and not wrong_faces:
        suspects.append("intersecting parts or internal faces")
    if overlapping:
        suspects.append("overlapping UVs")
    return suspects


def _asset_mean_chord_row(flat, maps, overridden: list[str], suspects: list[str]) -> Check:
    """Cauchy's mean chord 4V/S (scene units) of the flat-shaded asset against its one bake.

    Skipped when the asset bakes into several maps or more than :data:`UNSAMPLED_LIMIT` of its
    surface has no texels; a failure names ``suspects`` (:func:`_mean_chord_suspects`).
    """
    name, rep = flat.name, flat.report
    result = maps[0]
    s = result.settings
    unsampled = 0.0
    if rep.area > 0 and len(maps) == 1:
        from thickbake.checks.coverage import exact_texel_coverage

        coverage = exact_texel_coverage(flat, s.width, s.height)
        unsampled = max(0.0, 1.0 - coverage.face_covered.sum() / rep.area)
    if len(maps) > 1:
        return Check(name, "Cauchy mean chord 4V/S", SKIP,
                     note=f"not applicable: the asset bakes into {len(maps)} maps (per material and UDIM tile); "
                          "the check needs the whole surface in one layout")
    if unsampled > UNSAMPLED_LIMIT:
        return Check(name, "Cauchy mean chord 4V/S", SKIP,
                     note=f"not applicable: {unsampled:.1%} of the surface has no texels (no UVs or UVs "
                          "outside the 0–1 square)")
    expected = 4.0 * rep.volume / rep.area
    row = _mean_chord_row(name, flat, result, expected, capped=False)
    row.note = ("bake with cone 90°, cosine lobe, thickness, reach = diagonal, flat shading"
                + (f" (overrides your {', '.join('--' + k.replace('_', '-') for k in overridden)})"
                   if overridden else ""))
    if row.status == FAIL:
        direction = "longer" if row.measured > expected else "shorter"
        row.note += (f"; chords read {direction} than the solid allows ({row.figures['relative_error']:+.2%}): "
                     f"{' and '.join(suspects) if suspects else 'some inward rays do not measure the solid'} — "
                     "fix the rows above and verify again")
    return row


def _asset_verdict(checks: list[Check]) -> str:
    """The last line of an asset's report: "fit for baking" (naming the warnings) or what failed."""
    failed = [c for c in checks if c.status == FAIL]
    if failed:
        return "not fit for baking: " + "; ".join(f"{c.quantity} ({_short(c)})" for c in failed)
    warns = [c.quantity for c in checks if c.status == WARN]
    return "fit for baking" + (f" (see the warnings: {', '.join(warns)})" if warns else "")


def _short(check: Check) -> str:
    f = check.figures
    if check.quantity == "closed surface":
        return f"{f.get('open_edges', 0):,} open edges, {f.get('open_length', 0.0):.3g} scene units long"
    if check.quantity == "faces wound outward":
        return f"{f.get('wrong_faces', 0):,} faces point inward"
    if check.quantity.startswith("rays "):
        return f"{check.measured:.2%} of rays"
    if "relative_error" in f:
        return f"{f['relative_error']:+.2%} against 4V/S"
    return check.note[:60]


__all__ = ["VERIFY_DEFAULTS", "Check", "VerifyReport", "verify_shapes", "verify_asset", "cauchy_not_applicable"]
