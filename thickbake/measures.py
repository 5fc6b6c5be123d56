"""What a map can hold: one small object per measure, looked up by the name settings and sidecars use.

A :class:`Measure` knows everything about itself that the rest of the package needs: the value a
single ray contributes, its units, the range an integer image encodes and how it decodes, the default
reach, and how fast its value can change with the chord (for error budgets).  Adding a measure is
one new class here and one entry in :data:`MEASURES`; nothing else switches on its name.

For a ray with chord ``d`` (first-hit distance from the surface point, scene units), reach ``R``
and attenuation distance ``L``:

* ``thickness``      value = min(d, R); a miss counts as R.  Scene units; encoded as value / R.
* ``transmittance``  value = exp(−min(d, R) / L), Beer–Lambert (the glTF KHR_materials_volume
  ``attenuationDistance``: T(x) = c^(x/L) per colour channel, here for c = 1/e).  Unitless, 0 … 1.
* ``occlusion``      value = 1 if the ray hits within R, else 0: ambient occlusion of the
  inward-facing surface (high = thin).  Unitless, 0 … 1.

>>> measure_named("thickness").full_scale(2.5)
2.5
>>> measure_named("occlusion").units
'unitless'
"""

from __future__ import annotations

import numpy as np

from thickbake.errors import ThickbakeError


class Measure:
    """Base of the measures; subclasses set the attributes and implement :meth:`ray_values`.

    Attributes
    ----------
    name : str
        The name in settings, sidecars and file names.
    units : str
        ``"scene units"`` or ``"unitless"`` (recorded in the sidecar).
    unit_label : str
        Text after a number in reports: ``"scene units"``, or empty for unitless measures.
    reach_fraction : float
        Default reach as a fraction of the bounding-box diagonal.
    uses_attenuation : bool
        Whether the value depends on the attenuation distance (which then gets a default).
    """

    name: str = ""
    units: str = "unitless"
    unit_label: str = ""
    reach_fraction: float = 1.0
    uses_attenuation: bool = False

    def full_scale(self, reach: float | None) -> float:
        """The value an integer image's top code stands for (measure units): 1 unless overridden."""
        return 1.0

    def ray_values(self, chord: np.ndarray, hit: np.ndarray, reach: float,
                   attenuation_distance: float | None) -> np.ndarray:
        """Per-ray values.

        Parameters
        ----------
        chord : (n, k) float32 or float64
            Chord length from the surface point, scene units (already bias-corrected).
        hit : (n, k) bool
            Whether the ray hit the mesh within reach.
        reach : float
            Scene units.
        attenuation_distance : float or None
            Scene units; needed where :attr:`uses_attenuation`.

        Returns
        -------
        (n, k) float64
        """
        raise NotImplementedError

    def value_change_bound(self, chord, error, reach: float, attenuation_distance: float | None) -> np.ndarray:
        """sup |g(ℓ + Δ) − g(ℓ)| over |Δ| ≤ ``error``: how far a chord error moves the per-ray value.

        ``chord`` and ``error`` broadcast (scene units); returns float64 in measure units.
        """
        raise NotImplementedError

    def lipschitz(self, attenuation_distance: float | None) -> float | None:
        """Largest slope of the per-ray value per scene unit of chord, or None for a step function."""
        raise NotImplementedError

    def __repr__(self) -> str:
        return f"<measure {self.name}>"


def _clipped_chord(chord: np.ndarray, hit: np.ndarray, reach: float) -> np.ndarray:
    """(n, k) float64 min(chord, reach), with misses at the reach."""
    reach = float(reach)  # a Python float keeps the chords' dtype (float32 from the engine)
    return np.where(hit, np.minimum(chord, reach), reach).astype(np.float64)


class Thickness(Measure):
    """Mean chord, clipped at the reach (scene units)."""

    name = "thickness"
    units = "scene units"
    unit_label = "scene units"
    #: The bounding-box diagonal is longer than any chord of the mesh, so no inward ray of a closed
    #: mesh is clipped.
    reach_fraction = 1.0

    def full_scale(self, reach: float | None) -> float:
        return float(reach)

    def ray_values(self, chord, hit, reach, attenuation_distance):
        return _clipped_chord(chord, hit, reach)

    def value_change_bound(self, chord, error, reach, attenuation_distance):
        chord = np.asarray(chord, np.float64)
        error = np.asarray(error, np.float64)
        return error + 0.0 * chord  # min(·, ρ) is 1-Lipschitz

    def lipschitz(self, attenuation_distance):
        return 1.0


class Transmittance(Measure):
    """Mean Beer–Lambert transmittance exp(−min(d, R) / L) (unitless)."""

    name = "transmittance"
    reach_fraction = 1.0
    uses_attenuation = True

    def ray_values(self, chord, hit, reach, attenuation_distance):
        return np.exp(-_clipped_chord(chord, hit, reach) / float(attenuation_distance))

    def value_change_bound(self, chord, error, reach, attenuation_distance):
        # the largest slope of exp(−d/L) on the interval of d within the error
        chord = np.asarray(chord, np.float64)
        error = np.asarray(error, np.float64)
        low = np.maximum(np.minimum(chord, reach) - error, 0.0)
        return error / attenuation_distance * np.exp(-low / attenuation_distance)

    def lipschitz(self, attenuation_distance):
        return 1.0 / attenuation_distance


class Occlusion(Measure):
    """Share of rays that hit within the reach (unitless)."""

    name = "occlusion"
    #: On a closed mesh every inward ray hits something, so the hit fraction only varies when the
    #: reach is shorter than the thick parts; a quarter of the diagonal separates thin features (ears,
    #: leaves, rims) from the body on typical props.  Common practice, no published source.
    reach_fraction = 0.25

    def ray_values(self, chord, hit, reach, attenuation_distance):
        return hit.astype(np.float64)

    def value_change_bound(self, chord, error, reach, attenuation_distance):
        # the hit/miss decision can flip when the chord is within the error of the reach
        chord = np.asarray(chord, np.float64)
        error = np.asarray(error, np.float64)
        return (np.abs(chord - reach) <= error).astype(np.float64)

    def lipschitz(self, attenuation_distance):
        return None


#: Every measure by name, the default first.
MEASURES: dict[str, Measure] = {m.name: m for m in (Thickness(), Transmittance(), Occlusion())}


def measure_named(measure: str | Measure) -> Measure:
    """The :class:`Measure` of a name (a Measure passes through); unknown names raise ThickbakeError."""
    if isinstance(measure, Measure):
        return measure
    try:
        return MEASURES[measure]
    except (KeyError, TypeError):
        raise ThickbakeError(f"unknown measure {measure!r}",
                             fix=f"use {' or '.join(repr(n) for n in MEASURES)}") from None


__all__ = ["Measure", "Thickness", "Transmittance", "Occlusion", "MEASURES", "measure_named"]
