"""Distributions of ray directions in a cone around the inward normal, one object per lobe.

Each lobe is a sampling trio (pbrt's convention): :meth:`Lobe.sample` maps uniform variates
``u ∈ [0, 1)²`` to unit vectors in a local frame whose +z axis is the lobe axis, :meth:`Lobe.pdf` is
their density over solid angle and :meth:`Lobe.inverse` maps directions back to ``u``.  Adding a lobe
is one new class here and one entry in :data:`LOBES`.

For a cone of half-angle α around +z (c = cos α), with φ = 2π·u₂:

* ``uniform`` over the cone's solid angle 2π(1 − c): cosθ = 1 − u₁(1 − c); pdf = 1 / (2π(1 − c)).
* ``cosine`` (pdf ∝ cosθ): sin²θ = u₁·sin²α, i.e. Malley's method — points uniform on the disk of
  radius sin α projected up to the hemisphere; pdf = cosθ / (π sin²α).  With α = 90° this is the
  cosine-weighted hemisphere, pdf = cosθ/π (Pharr, Jakob & Humphreys, *Physically Based Rendering*,
  4th ed., sampling appendix, "cosine-weighted hemisphere sampling" — from memory).

The polar form (r = √u₁, φ = 2πu₂) is used rather than the concentric disk map: it keeps u₁ a
function of θ alone, so a 1-D stratification of u₁ stratifies the polar angle exactly.

>>> d = lobe_named("cosine").sample(np.array([[0.0, 0.0]]), 90.0)
>>> np.allclose(d, [[0, 0, 1]])
True
"""

from __future__ import annotations

import math

import numpy as np

from thickbake.constants import CONE_EDGE_COS_TOLERANCE
from thickbake.errors import ThickbakeError


class Lobe:
    """Base of the lobes; subclasses implement the polar part (θ), the azimuth is uniform for all.

    Attributes
    ----------
    name : str
        The name in settings and sidecars.
    cosine_power : int or None
        p in pdf ∝ cos^p θ (1 cosine-weighted, 0 uniform); closed forms over the lobe use it
        (:func:`thickbake.checks.shapes.sphere_cone_forms`).  None, the default, for a density of
        another form: a new lobe then has no closed form until it says which it has.
    """

    name: str = ""
    cosine_power: int | None = None

    def cos_sin(self, u1: np.ndarray, cone_deg: float):
        """cosθ and sinθ (same shape and dtype as ``u1``) of the polar angle drawn from variate u1."""
        raise NotImplementedError

    def _pdf_inside(self, cos_t: np.ndarray, alpha: float) -> np.ndarray:
        raise NotImplementedError

    def _u1(self, cos_t: np.ndarray, alpha: float) -> np.ndarray:
        raise NotImplementedError

    def polar_weight(self, x: np.ndarray) -> np.ndarray:
        """Unnormalised density of x = cosθ on [c, 1] (solid angle is dx dφ): x^p."""
        raise NotImplementedError

    def sample(self, u: np.ndarray, cone_deg: float) -> np.ndarray:
        """Map (…, 2) variates in [0, 1) to (…, 3) unit directions in the local frame (+z = lobe axis).

        Parameters
        ----------
        u : (..., 2) float
        cone_deg : float
            Cone half-angle α in degrees, 0 … 90.
        """
        cos_t, sin_t = self.cos_sin(u[..., 0], cone_deg)
        phi = u[..., 1] * np.float32(2 * math.pi)
        out = np.empty(u.shape[:-1] + (3,), dtype=u.dtype)
        out[..., 0] = sin_t * np.cos(phi)
        out[..., 1] = sin_t * np.sin(phi)
        out[..., 2] = cos_t
        return out

    def pdf(self, directions: np.ndarray, cone_deg: float) -> np.ndarray:
        """Solid-angle density (…,) of local directions (…, 3) under the lobe; 0 outside the cone."""
        alpha = math.radians(cone_deg)
        cos_t = directions[..., 2]
        inside = cos_t >= math.cos(alpha) - CONE_EDGE_COS_TOLERANCE
        return np.where(inside, self._pdf_inside(cos_t, alpha), 0.0)

    def inverse(self, directions: np.ndarray, cone_deg: float) -> np.ndarray:
        """Inverse of :meth:`sample`: (…, 3) local directions → (…, 2) variates in [0, 1)."""
        alpha = math.radians(cone_deg)
        cos_t = np.clip(directions[..., 2], -1, 1)
        u1 = self._u1(cos_t, alpha)
        phi = np.arctan2(directions[..., 1], directions[..., 0])
        u2 = np.mod(phi / (2 * math.pi), 1.0)
        return np.stack([u1, u2], axis=-1)

    def __repr__(self) -> str:
        return f"<lobe {self.name}>"


class CosineLobe(Lobe):
    """pdf = cosθ / (π sin²α) in the cone (Malley's method)."""

    name = "cosine"
    cosine_power = 1

    def cos_sin(self, u1, cone_deg):
        alpha = math.radians(cone_deg)
        dtype = u1.dtype.type
        sin2 = u1 * dtype(math.sin(alpha) ** 2)
        cos_t = np.sqrt(np.maximum(1 - sin2, 0))
        return cos_t, np.sqrt(sin2)

    def _pdf_inside(self, cos_t, alpha):
        return cos_t / (math.pi * math.sin(alpha) ** 2)

    def _u1(self, cos_t, alpha):
        return (1 - cos_t * cos_t) / math.sin(alpha) ** 2

    def polar_weight(self, x):
        return x.copy()


class UniformLobe(Lobe):
    """pdf = 1 / (2π(1 − cos α)) in the cone."""

    name = "uniform"
    cosine_power = 0

    def cos_sin(self, u1, cone_deg):
        alpha = math.radians(cone_deg)
        dtype = u1.dtype.type
        cos_t = 1 - u1 * dtype(1 - math.cos(alpha))
        sin2 = np.maximum(1 - cos_t * cos_t, 0)
        return cos_t, np.sqrt(sin2)

    def _pdf_inside(self, cos_t, alpha):
        return np.full_like(cos_t, 1.0 / (2 * math.pi * (1 - math.cos(alpha))))

    def _u1(self, cos_t, alpha):
        return (1 - cos_t) / (1 - math.cos(alpha))

    def polar_weight(self, x):
        return np.ones_like(x)


#: Every lobe by name, the default first.
LOBES: dict[str, Lobe] = {lobe.name: lobe for lobe in (CosineLobe(), UniformLobe())}


def lobe_named(lobe: str | Lobe) -> Lobe:
    """The :class:`Lobe` of a name (a Lobe passes through); unknown names raise ThickbakeError."""
    if isinstance(lobe, Lobe):
        return lobe
    try:
        return LOBES[lobe]
    except (KeyError, TypeError):
        raise ThickbakeError(f"unknown lobe {lobe!r}", fix=f"use {' or '.join(repr(n) for n in LOBES)}") from None


__all__ = ["Lobe", "CosineLobe", "UniformLobe", "LOBES", "lobe_named"]
