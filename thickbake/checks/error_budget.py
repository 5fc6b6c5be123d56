"""Closed forms and error budgets used by ``thickbake verify``, each with its derivation.

Sphere seen through a cone of directions
----------------------------------------
A ray leaving a point of a sphere of radius R at angle θ from the inward normal travels ℓ = 2R·x,
x = cos θ, before it leaves (the chord subtends π − 2θ at the centre).  Directions in a cone of
half-angle α (c = cos α) have, with dΩ = dx dφ,

* ``cosine`` lobe (pdf ∝ cos θ):  x has density 2x / (1 − c²) on [c, 1];
* ``uniform`` lobe:               x is uniform on [c, 1].

A bake records g(ℓ) per ray: thickness min(ℓ, ρ) (ρ the reach), transmittance exp(−min(ℓ, ρ)/L),
occlusion 1[ℓ < ρ].  Rays with x > x₀ = ρ / 2R are clipped, so with x₀ clamped to [c, 1] and
W = x₀ − c, τ = 2R / L (our derivation, checked against scipy.integrate in the tests):

* thickness, cosine   [4R(x₀³ − c³)/3 + ρ(1 − x₀²)] / (1 − c²)   (ρ ≥ 2R: 4R(1 + c + c²) / (3(1 + c)))
* thickness, uniform  [R(x₀² − c²) + ρ(1 − x₀)] / (1 − c)             (ρ ≥ 2R: R(1 + c))
* transmittance, cosine   [2 e^(−τc)(cW·g₁(τW) + W²·g₂(τW)) + e^(−ρ/L)(1 − x₀²)] / (1 − c²)
* transmittance, uniform  [e^(−τc) W g₁(τW) + e^(−ρ/L)(1 − x₀)] / (1 − c)
* occlusion, cosine   (x₀² − c²) / (1 − c²);  uniform  (x₀ − c) / (1 − c)

with g₁(y) = (1 − e^(−y))/y and g₂(y) = (1 − e^(−y)(1 + y))/y², both evaluated without
cancellation.  α = 0 gives g(2R).  At α = 90° and ρ ≥ 2R these are the hemisphere means
4R/3, R and the Beer–Lambert sphere averages.

Per-ray error of a faceted sphere bake
--------------------------------------
The mesh is within δ (``Shape.facet_error``, a Hausdorff bound) of the sphere.  To first order in
δ/R: the sample point lies up to δ inside, which changes the chord by δ·|2x² − 1|/x ≤ δ/x; the exit
point moves by up to δ along the exit normal, which changes it by δ/x (a sphere chord leaves at the
same angle it enters).  The bake starts each ray b (the bias) further in along the normal and adds
b·x back; on a sphere the residual is b(1 − x²)/x.  Near grazing the first-order form fails; there
the chord from a point up to d = δ + b deep is at most 2Rx + √(2Rd) (circumscribed sphere), and at
least 0.  Hence

    e(x) = min( (2δ + b(1 − x²)) / x ,  2Rx + √(2R(δ + b)) + b ).

A texel's systematic bound is the lobe average of the measure's modulus over that error, computed
by a dense midpoint rule in x (:func:`sphere_systematic_bound`).

Coverage factors
----------------
σ̂ is the bake's standard-error map: per texel, the spread of R = 4 independent randomised-QMC
replicates (:mod:`thickbake.pipeline.measures`), an honest estimate of the error of the estimator
actually used, with only R − 1 = 3 degrees of freedom per texel, moderated with its 4×4-texel block
(σ̃, on d₀ᵢ + 3 degrees of freedom, ``BakeResult.stderr_dof``;
:func:`thickbake.pipeline.measures.moderated_stderr_map`).

* Every texel: |error| ≤ systematic + k·σ_pool, σ_pool the RMS of σ̂ over the compared texels (the
  sphere's texels see one integrand by symmetry, so they share one σ; n·(R − 1) degrees of freedom)
  and k the Student-t quantile for those dof at two-sided level α/n (Bonferroni over n texels,
  family-wise false alarm α = 10⁻³).  A per-texel t with 3 dof would need k ≈ 500 at 65,536 texels.
* 95% of texels: |error| ≤ systematic + t_{0.975, d₀ᵢ+3}·σ̃ (2.01σ̃ at 48 dof, up to 3.18σ̃ at 3), the
  calibrated band; all but 5% + :data:`CALIBRATION_SLACK` + 4 binomial standard deviations
  sqrt(0.05·0.95/n) of the texels must lie inside it.
* The Cauchy mean over the map: 4σ of the area-weighted mean (two-sided normal tail 6·10⁻⁵ per row,
  below 10⁻³ family-wise over the at most 16 rows of a run); the sum over many texels pools their
  degrees of freedom.
"""

from __future__ import annotations

import math

import numpy as np

from thickbake.checks.shapes import _g1, _g2  # the same cancellation-free forms as the cone closed forms
from thickbake.checks.shapes import sphere_cone_forms
from thickbake.constants import FLOAT32_EPS, FLOAT32_ULPS
from thickbake.lobes import lobe_named
from thickbake.measures import Measure, measure_named

#: Family-wise false-alarm rate of the per-texel "every texel" criterion.
FAMILY_ALPHA = 1e-3
#: Chebyshev factor 1 / k² = 0.05, valid for any distribution when σ is known (kept for reference).
CHEBYSHEV_K95 = math.sqrt(20.0)
#: Nominal level of the per-texel band.
LEVEL_95 = 0.95
#: How far the 95% band's measured coverage may fall short of 0.95: the acceptance band of the
#: calibration table (scripts/calibration.py), where the replicate means' skew at few rays costs a
#: few points (t-intervals assume normal replicate means).
CALIBRATION_SLACK = 0.03
#: Coverage factor of the Cauchy row's statistical term (see module docstring).
CAUCHY_K = 4.0
#: Budget for the Cauchy consistency check: 1% of 4V/S (the project's acceptance criterion, not a published figure).
CAUCHY_BUDGET = 0.01
#: Cone half-angles (radians) at or below this are treated as a single ray along the normal: the closed
#: forms divide by sin²α and 1 − cos α, which lose all precision there.
SPHERE_CONE_ZERO_RAD = 1e-7
#: Midpoint-rule nodes for lobe averages of error bounds (our own bounds, not an external check).
LOBE_NODES = 1 << 14


def float32_term(diagonal: float) -> float:
    """Bound on float32 round-off in a chord, scene units: 8 ulps of the bounding-box diagonal."""
    return FLOAT32_ULPS * FLOAT32_EPS * float(diagonal)


def half_code_step(measure: str, reach: float, bits: int) -> float:
    """Half an integer code step in measure units (round-to-nearest quantisation)."""
    from thickbake.maps.encode import quantisation_step

    return 0.5 * quantisation_step(measure, reach, int(bits))


def bonferroni_k(texels: int, dof: int, alpha: float = FAMILY_ALPHA) -> float:
    """Student-t coverage factor for "every one of ``texels`` within k·σ" at family-wise ``alpha``.

    Returns 0 when ``dof`` < 1 (one ray per sample: no error estimate to scale).
    """
    if dof < 1 or texels < 1:
        return 0.0
    from scipy import stats

    return float(stats.t.isf(alpha / (2.0 * texels), dof))


# ---------------------------------------------------------------------------- measures
def measure_value(chord, measure: str | Measure, reach: float, attenuation_distance: float | None):
    """The bake's per-ray value g(ℓ) of a hit at distance ℓ (scene units): :meth:`Measure.ray_values`."""
    chord = np.asarray(chord, np.float64)
    return measure_named(measure).ray_values(chord, chord < reach, reach, attenuation_distance)


def measure_modulus(chord, error, measure: str | Measure, reach: float, attenuation_distance: float | None):
    """sup |g(ℓ + Δ) − g(ℓ)| over |Δ| ≤ error: how far a chord error of ``error`` moves the measure.

    thickness: ``error`` (min(·, ρ) is 1-Lipschitz); transmittance: error/L · e^(−(min(ℓ, ρ) − error)/L)
    (the largest slope of exp(−d/L) on the interval); occlusion: 1 when ℓ is within ``error`` of the
    reach (the hit/miss decision can flip), else 0.  See :meth:`Measure.value_change_bound`.
    """
    return measure_named(measure).value_change_bound(chord, error, reach, attenuation_distance)


# ---------------------------------------------------------------------------- sphere closed forms
def sphere_cone_expected(radius: float, cone_rad: float, lobe: str, measure: str, reach: float,
                         attenuation_distance: float | None = None) -> float:
    """Expected per-texel value of a bake of a sphere (closed form, reach clipping included).

    Parameters
    ----------
    radius : float
        R, scene units.
    cone_rad : float
        Cone half-angle α in radians, 0 … π/2.
    lobe : {"cosine", "uniform"}
    measure : {"thickness", "transmittance", "occlusion"}
    reach : float
        ρ, scene units.
    attenuation_distance : float, optional
        L for transmittance, scene units.

    Returns
    -------
    float
        Scene units for thickness, unitless otherwise.

    Examples
    --------
    >>> round(sphere_cone_expected(1.7, 1.0, "cosine", "thickness", 10.0), 12)
    2.696257825099
    """
    R, rho = float(radius), float(reach)
    m, cosine = measure_named(measure), sphere_cone_forms(lobe).cosine_power == 1
    if cone_rad <= SPHERE_CONE_ZERO_RAD:
        return float(measure_value(2 * R, m, rho, attenuation_distance))
    c = math.cos(cone_rad)
    one_minus_c = 2.0 * math.sin(cone_rad / 2.0) ** 2
    sin2 = math.sin(cone_rad) ** 2
    x0 = min(max(rho / (2.0 * R), c), 1.0)
    one_minus_x0 = 1.0 - x0 if x0 < 1.0 else 0.0
    width = max(one_minus_c - one_minus_x0, 0.0)  # W = x0 − c
    return _SPHERE_CONE_FORMS[m.name](R, rho, attenuation_distance, cosine, c, one_minus_c, sin2, x0, one_minus_x0,
                                      width)


def _sphere_thickness(R, rho, L, cosine, c, one_minus_c, sin2, x0, one_minus_x0, width) -> float:
    if cosine:
        return (4.0 * R * width * (x0 * x0 + x0 * c + c * c) / 3.0 + rho * one_minus_x0 * (1.0 + x0)) / sin2
    return (R * width * (x0 + c) + rho * one_minus_x0) / one_minus_c


def _sphere_transmittance(R, rho, L, cosine, c, one_minus_c, sin2, x0, one_minus_x0, width) -> float:
    L = float(L)
    tau = 2.0 * R / L
    head = math.exp(-tau * c)
    tail = math.exp(-rho / L)
    if cosine:
        part = 2.0 * head * (c * width * float(_g1(tau * width)) + width * width * float(_g2(tau * width)))
        return (part + tail * one_minus_x0 * (1.0 + x0)) / sin2
    return (head * width * float(_g1(tau * width)) + tail * one_minus_x0) / one_minus_c


def _sphere_occlusion(R, rho, L, cosine, c, one_minus_c, sin2, x0, one_minus_x0, width) -> float:
    if cosine:
        return width * (x0 + c) / sin2
    return width / one_minus_c


#: The closed form of each measure over a sphere (module docstring); a new measure needs its own here
#: before ``verify`` can check it.
_SPHERE_CONE_FORMS = {"thickness": _sphere_thickness, "transmittance": _sphere_transmittance,
                      "occlusion": _sphere_occlusion}


def _lobe_nodes(cone_rad: float, lobe: str):
    """Midpoint nodes x = cos θ on [c, 1] and their weights under the lobe (summing to 1)."""
    c = math.cos(cone_rad)
    edges = np.linspace(c, 1.0, LOBE_NODES + 1)
    x = 0.5 * (edges[:-1] + edges[1:])
    weight = lobe_named(lobe).polar_weight(x)
    return x, weight / weight.sum()


def sphere_ray_error(x, radius: float, facet: float, bias: float):
    """e(x): bound on one ray's chord error on a faceted sphere (module docstring), scene units."""
    x = np.asarray(x, np.float64)
    first_order = (2.0 * facet + bias * (1.0 - x * x)) / np.maximum(x, 1e-300)
    crude = 2.0 * radius * x + math.sqrt(2.0 * radius * (facet + bias)) + bias
    return np.minimum(first_order, crude)


def sphere_systematic_bound(radius: float, cone_rad: float, lobe: str, measure: str, reach: float,
                            attenuation_distance: float | None, facet: float, bias: float) -> float:
    """Lobe average of the measure's modulus over e(x): a texel's facet + bias bound (measure units)."""
    if cone_rad <= SPHERE_CONE_ZERO_RAD:
        return float(measure_modulus(2 * radius, sphere_ray_error(1.0, radius, facet, 0.0), measure, reach,
                                     attenuation_distance))
    x, w = _lobe_nodes(cone_rad, lobe)
    e = sphere_ray_error(x, radius, facet, bias)
    return float((measure_modulus(2 * radius * x, e, measure, reach, attenuation_distance) * w).sum())


def measure_lipschitz(measure: str | Measure, attenuation_distance: float | None) -> float | None:
    """Largest slope of g(ℓ) (per scene unit), None for occlusion (a step): :meth:`Measure.lipschitz`."""
    return measure_named(measure).lipschitz(attenuation_distance)


# ---------------------------------------------------------------------------- Cauchy row
def cauchy_bias_bound(bias: float) -> float:
    """Bias error of the cosine-lobe mean chord over a closed surface, scene units: 8b/3.

    Starting a ray b further in along the normal n and adding b·x back leaves, to first order,
    b·(x + (n_e·n)/(n_e·ω)) with x = cos θ at the start and n_e the exit normal, so at most
    b·(x + 1/x_e), x_e the exit cosine.  Under the cosine lobe E[x] = 2/3; the chord measure is
    symmetric in its two ends (the invariant measure of lines; Santaló 1976), so exit cosines are
    cosine-distributed as well and the surface average of 1/x_e is E[1/x] = 2.  Sum: 8b/3.
    """
    return 8.0 * float(bias) / 3.0


#: Area-averaged Lipschitz constant of the cosine-lobe mean chord along the surface (dimensionless):
#: moving a chord's start by d changes its length by at most d·(1 + 1/x_e) to first order; the surface
#: average of 1/x_e is 2 (see :func:`cauchy_bias_bound`).  Used for the texel-position term of the
#: quadrature bound; it is an average, larger locally near solid edges.
MEAN_CHORD_LIPSCHITZ = 3.0


__all__ = [
    "FAMILY_ALPHA", "CHEBYSHEV_K95", "LEVEL_95", "CALIBRATION_SLACK", "CAUCHY_K", "CAUCHY_BUDGET", "MEAN_CHORD_LIPSCHITZ",
    "float32_term", "half_code_step", "bonferroni_k", "measure_value", "measure_modulus", "measure_lipschitz",
    "sphere_cone_expected", "sphere_ray_error", "sphere_systematic_bound", "cauchy_bias_bound",
]
