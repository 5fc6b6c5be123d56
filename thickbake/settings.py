"""The validated settings shared by the API, the command line and batch rules files.

Two objects, built once (from keyword arguments, parsed options or a TOML table) and then passed down;
no stage of the bake reads the command line or globals:

* :class:`BakeSettings` — everything that decides the map's content.  It is hashed
  (:meth:`BakeSettings.content_hash`, which batch runs use to tell whether a map is up to date) and
  recorded in the sidecar under ``"settings"``.
* :class:`RunOptions` — how the bake runs (threads, rays per work item, texel order).  They never
  change a map, are not hashed, and are recorded under ``"run"``.

:func:`settings_from_mapping` splits one flat mapping (a command line, a rules table) into the two.  Every length is in *scene units*
(the units of the mesh's world-space coordinates, after node transforms).  Options that default to a
size relative to the mesh (``reach``, ``bias``, ``attenuation_distance``) stay ``None`` here and are
resolved against the mesh's bounding box by :meth:`BakeSettings.resolve`.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import numbers
import os
from dataclasses import dataclass, fields
from typing import Any, Mapping

from thickbake.constants import ATTENUATION_DIAGONAL_FRACTION, BIAS_DIAGONAL_FRACTION
from thickbake.errors import ThickbakeError
from thickbake.lobes import LOBES as _LOBE_OBJECTS
from thickbake.measures import MEASURES as _MEASURE_OBJECTS, measure_named

#: Names accepted for ``measure`` and ``lobe``: the registries of :mod:`thickbake.measures` and
#: :mod:`thickbake.lobes` (a new measure or lobe is added there, not here).
MEASURES = tuple(_MEASURE_OBJECTS)
LOBES = tuple(_LOBE_OBJECTS)
SEQUENCES = ("sobol", "random")
ORDERS = ("morton", "rows")
#: Refuse bakes whose maps would need more memory than this (estimated by :func:`estimate_bytes`).
MEMORY_CAP_BYTES = 8 * 1024**3
#: Largest accepted side of a map, in texels.
MAX_SIDE = 32768
#: Largest accepted seed: seeds are 64-bit unsigned integers (0 .. 2**64 - 1).
MAX_SEED = 2**64 - 1
#: Accepted ``reach`` and ``attenuation_distance``, as multiples of the bounding-box diagonal.  Outside
#: this range every texel reads the same value (all misses, or all hits at the start), and the
#: float32 distances the ray engine returns lose all resolution or overflow.
LENGTH_RANGE_DIAGONALS = (1e-6, 1e6)
#: Accepted non-zero ``bias``, as multiples of the diagonal: below 1e-9 it is under float32's
#: resolution of any position on the mesh (the same as 0); above 1 every ray starts outside the mesh.
BIAS_RANGE_DIAGONALS = (1e-9, 1.0)


def usable_cores() -> int:
    """Cores this process may run on (CPU affinity, e.g. under taskset or a container limit)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def default_pad(width: int, height: int) -> int:
    """Default seam padding in texels: max(2, longest side / 256).

    4 texels at 1024², 16 at 4096² — enough that the coarser mip levels a real-time renderer samples
    do not blend the background into island borders.  Common practice, no published source.
    """
    return max(2, max(width, height) // 256)


def estimate_bytes(width: int, height: int, chunk_rays: int) -> int:
    """Rough peak memory of a bake in bytes.

    Per texel the bake holds the float32 map, standard-error, degrees-of-freedom and area maps, ray
    counts, coverage claims, the error moderation's block sums, and for padding and encoding a float64
    copy and the distance transform's indices: ~72 bytes (a 4096² bake measured 1,106 MB peak, 69
    bytes a texel, with ``bench_memory`` of scripts/bench.py).  Per ray in flight, origins, directions
    and distances in float32 plus float64 temporaries: ~80 bytes.
    """
    return int(width) * int(height) * 72 + int(chunk_rays) * 80


def parse_size(text: str | int | tuple | list) -> tuple[int, int]:
    """Parse ``1024``, ``"1024"``, ``"2048x1024"`` or ``(2048, 1024)`` into (width, height)."""
    if isinstance(text, (tuple, list)):
        if len(text) != 2:
            raise ThickbakeError(f"size {text!r} must be N or [WIDTH, HEIGHT]", fix="e.g. size = 1024")
        width, height = text
    elif _is_int(text):
        width = height = int(text)
    elif isinstance(text, str):
        parts = text.lower().replace("×", "x").split("x")
        try:
            nums = [int(p) for p in parts]
        except ValueError:
            raise ThickbakeError(f"size {text!r} is not a number", fix="give N or WIDTHxHEIGHT, e.g. 1024 or 2048x1024") from None
        if len(nums) == 1:
            width = height = nums[0]
        elif len(nums) == 2:
            width, height = nums
        else:
            raise ThickbakeError(f"size {text!r} has too many parts", fix="give N or WIDTHxHEIGHT, e.g. 2048x1024")
    else:
        raise ThickbakeError(f"size {text!r} is not a number", fix="give N or WIDTHxHEIGHT, e.g. 1024")
    for side in (width, height):
        if not _is_int(side) or side <= 0:
            raise ThickbakeError(f"size {text!r} must be positive whole numbers of texels", fix="e.g. 1024 or 2048x1024")
        if side > MAX_SIDE:
            raise ThickbakeError(f"size {text!r} is larger than {MAX_SIDE} texels per side", fix="bake a smaller map")
    return int(width), int(height)


def parse_blockers(text) -> str:
    """Normalise a blocker choice: ``"all"``, ``"own"`` or a comma list of names (spaces trimmed)."""
    if text is None:
        return "all"
    if isinstance(text, (list, tuple)):
        text = ",".join(str(t) for t in text)
    if not isinstance(text, str):
        raise ThickbakeError(f"setting blockers = {text!r} is not allowed",
                             fix="use 'all', 'own' or a comma-separated list of part or material names")
    names = [t.strip() for t in text.split(",") if t.strip()]
    if not names:
        raise ThickbakeError("setting blockers is empty", fix="use 'all', 'own' or part or material names")
    if len(names) == 1 and names[0] in ("all", "own"):
        return names[0]
    return ",".join(names)


@dataclass(frozen=True)
class BakeSettings:
    """Everything that decides the content of a baked map.

    All lengths are in scene units.  ``None`` means "relative to the mesh" and is resolved by
    :meth:`resolve`; a resolved copy is what the sidecar records.

    Attributes
    ----------
    size : (int, int)
        Map width and height in texels (``1024`` → (1024, 1024); ``"2048x1024"`` is accepted).
    rays : int
        Rays per surface sample (the cap when ``target_error`` is set).  Powers of two keep the
        low-discrepancy set balanced.
    cone : float
        Half-angle in degrees of the cone of directions around the inward normal: 0 casts exactly
        along −N, 90 covers the whole hemisphere.
    lobe : {"cosine", "uniform"}
        Distribution of directions within the cone: cosine-weighted (pdf ∝ cosθ) or uniform over
        solid angle.
    measure : {"thickness", "transmittance", "occlusion"}
        ``thickness``: mean of min(hit distance, reach), scene units.  ``transmittance``: mean of
        exp(−d / attenuation_distance), Beer–Lambert.  ``occlusion``: fraction of rays that hit
        within reach (ambient occlusion of the inward-facing surface).
    reach : float, str or None
        Longest distance a ray may travel; misses count as ``reach``.  Default: the bounding-box
        diagonal for thickness/transmittance, a quarter of it for occlusion.  ``"30%"``: that share
        of the bounding-box diagonal.  ``"fit"`` (thickness only): trace with the diagonal, then
        encode with the :data:`FIT_PERCENTILE` percentile of the covered texels' values, so the
        map uses its whole code range (texels above it are clipped; the sidecar says how many).
    attenuation_distance : float or None
        Beer–Lambert distance L (the glTF KHR_materials_volume ``attenuationDistance``): light
        falls to 1/e after L.  Default: a tenth of the bounding-box diagonal.
    invert : bool
        Store 1 − value (bright = thin).
    supersample : int
        K: K×K stratified surface samples per texel (cost × K²).
    pad : int or "fill" or None
        Seam padding in texels, or "fill" for every empty texel; None → :func:`default_pad`.
    bits : {8, 16}
        Bit depth of PNG output.
    seed : int
        Seed of every random stream; the same seed gives bit-identical maps.
    bias : float or None
        Inward origin offset in scene units; None → 1e-4 × bounding-box diagonal.
    sequence : {"sobol", "random"}
        Directions from a scrambled Sobol set, split into 4 replicates per sample each with its own
        Cranley–Patterson rotation, or independent uniform random numbers (for comparison only).
    target_error : float or None
        Adaptive mode: stop adding rays to a sample once the replicate standard error of its mean,
        and the pooled one of its 4×4-texel block, are at most this (measure units); ``rays`` is the cap.
    medium : str or None
        A measured medium (:mod:`thickbake.media`, e.g. ``"marble"``): the map becomes the RGB
        transmittance exp(−σtr · d) through the baked thickness d.  Needs ``measure="thickness"``.
    scene_unit : str or None
        Length of one scene unit (``"1cm"``, ``"1m"``, ``"25.4mm"``) for ``medium``; default 1 m
        for glTF files (glTF 2.0 §3.5.1), required for other formats.
    uv_set : int
        UV channel whose layout the maps follow (glTF ``TEXCOORD_n``; OBJ and other formats have 0).
    blockers : str
        Which surfaces block a texel's rays: ``"all"`` parts, its ``"own"`` part only, or a comma
        list of part or material names (plus the texel's own part); see
        :mod:`thickbake.pipeline.blockers`.
    """

    size: tuple[int, int] = (1024, 1024)
    rays: int = 64
    cone: float = 90.0
    lobe: str = "cosine"
    measure: str = "thickness"
    reach: float | str | None = None
    attenuation_distance: float | None = None
    invert: bool = False
    supersample: int = 1
    pad: int | str | None = None
    bits: int = 16
    seed: int = 0
    bias: float | None = None
    sequence: str = "sobol"
    target_error: float | None = None
    medium: str | None = None
    scene_unit: str | None = None
    uv_set: int = 0
    blockers: str = "all"

    def __post_init__(self):
        object.__setattr__(self, "size", parse_size(self.size))
        _check_int(self, "rays", 1, 1 << 16)
        _check_float(self, "cone", 0.0, 90.0, inclusive_low=True)
        _check_choice(self, "lobe", LOBES)
        _check_choice(self, "measure", MEASURES)
        _check_reach(self)
        _check_optional_positive(self, "attenuation_distance")
        if not isinstance(self.invert, bool):
            raise _bad("invert", self.invert, "true or false")
        _check_int(self, "supersample", 1, 16)
        if self.pad is not None and not (isinstance(self.pad, str) and self.pad == "fill"):
            if isinstance(self.pad, str) and self.pad.isdigit():
                object.__setattr__(self, "pad", int(self.pad))
            if not _is_int(self.pad) or not 0 <= self.pad <= MAX_SIDE:
                raise _bad("pad", self.pad, f"a number of texels from 0 to {MAX_SIDE} or 'fill'")
            object.__setattr__(self, "pad", int(self.pad))
        if not _is_int(self.bits) or self.bits not in (8, 16):
            raise _bad("bits", self.bits, "8 or 16")
        object.__setattr__(self, "bits", int(self.bits))
        _check_int(self, "seed", 0, MAX_SEED)
        if self.bias is not None:
            _check_float(self, "bias", 0.0, math.inf, inclusive_low=True)
        _check_choice(self, "sequence", SEQUENCES)
        _check_optional_positive(self, "target_error")
        _check_medium(self)
        _check_int(self, "uv_set", 0, 255)
        object.__setattr__(self, "blockers", parse_blockers(self.blockers))
        check_memory(self, RunOptions())

    # ------------------------------------------------------------------ construction helpers
    @classmethod
    def from_mapping(cls, values: Mapping[str, Any], where: str = "settings") -> "BakeSettings":
        """Build from a mapping (TOML table, JSON, keyword arguments), naming unknown keys."""
        _check_keys(values, _names(cls), where)
        return cls(**values)

    def replace(self, **changes) -> "BakeSettings":
        """A copy with some fields changed (validated again)."""
        return dataclasses.replace(self, **changes)

    @property
    def width(self) -> int:
        return self.size[0]

    @property
    def height(self) -> int:
        return self.size[1]

    def resolve(self, diagonal: float) -> "BakeSettings":
        """Fill the mesh-relative defaults from the bounding-box diagonal (scene units).

        Lengths given explicitly must lie in :data:`LENGTH_RANGE_DIAGONALS` (reach, attenuation
        distance) or be 0 or in :data:`BIAS_RANGE_DIAGONALS` (bias) times the diagonal.
        """
        if not (diagonal > 0 and math.isfinite(diagonal)):
            raise ThickbakeError("the mesh's bounding box is empty", fix="check the file has geometry")
        changes: dict[str, Any] = {}
        measure = measure_named(self.measure)
        if self.reach is None or self.reach == "fit":
            # "fit" traces with the full default reach; the bake then narrows the encoded range
            changes["reach"] = float(diagonal * measure.reach_fraction)
        elif isinstance(self.reach, str):
            changes["reach"] = float(diagonal * float(self.reach[:-1]) / 100.0)
        if self.bias is None:
            changes["bias"] = float(diagonal * BIAS_DIAGONAL_FRACTION)
        if self.attenuation_distance is None and measure.uses_attenuation:
            changes["attenuation_distance"] = float(diagonal * ATTENUATION_DIAGONAL_FRACTION)
        if self.pad is None:
            changes["pad"] = default_pad(*self.size)
        resolved = dataclasses.replace(self, **changes) if changes else self
        for name, (low, high) in (("reach", LENGTH_RANGE_DIAGONALS), ("attenuation_distance", LENGTH_RANGE_DIAGONALS),
                                  ("bias", BIAS_RANGE_DIAGONALS)):
            value = getattr(resolved, name)
            if value is None or (name == "bias" and value == 0):
                continue
            if not (low * diagonal <= value <= high * diagonal):
                zero = "0 or " if name == "bias" else ""
                given = getattr(self, name)
                raise ThickbakeError(
                    f"setting {name} = {given if isinstance(given, str) else format(value, 'g')} does not fit a mesh "
                    f"{diagonal:.4g} scene units across",
                    fix=f"use {zero}{low:g} to {high:g} times the bounding-box diagonal, i.e. "
                        f"{low * diagonal:.3g} to {high * diagonal:.3g} scene units (or leave it out for the default)")
        return resolved

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able dict of every field."""
        out = dataclasses.asdict(self)
        out["size"] = list(self.size)
        return out

    def content_hash(self) -> str:
        """sha256 of every field (all of them decide the map's content), as compact sorted JSON.

        Run options are not fields, so they cannot enter it; the value equals what earlier versions
        computed with threads, chunking and order dropped, which keeps batch outputs up to date.
        Fields added later enter it only when they differ from their defaults (``medium``,
        ``scene_unit``: None; ``uv_set``: 0; ``blockers``: "all"), for the same reason.
        """
        data = self.to_dict()
        for key, default in OPTIONAL_CONTENT_DEFAULTS.items():
            if data.get(key) == default:
                data.pop(key, None)
        blob = json.dumps(data, sort_keys=True, separators=(",", ":")).encode()
        return hashlib.sha256(blob).hexdigest()


@dataclass(frozen=True)
class RunOptions:
    """How a bake runs; none of it changes the map (every random stream derives from seed and texel).

    Attributes
    ----------
    threads : int or None
        Worker threads; None → every core this process may use (:meth:`resolve`).
    chunk_rays : int
        Rays held in memory per work item; bounds memory and sets the thread-pool grain.
    order : {"morton", "rows"}
        Order of texels within a work item (Z-order keeps neighbouring rays coherent).
    """

    threads: int | None = None
    chunk_rays: int = 1 << 18
    order: str = "morton"

    def __post_init__(self):
        if self.threads is not None:
            _check_int(self, "threads", 1, 1024)
        _check_int(self, "chunk_rays", 1024, 1 << 28)
        _check_choice(self, "order", ORDERS)

    @classmethod
    def from_mapping(cls, values: Mapping[str, Any], where: str = "run options") -> "RunOptions":
        """Build from a mapping, naming unknown keys."""
        _check_keys(values, _names(cls), where)
        return cls(**values)

    def replace(self, **changes) -> "RunOptions":
        """A copy with some fields changed (validated again)."""
        return dataclasses.replace(self, **changes)

    def resolve(self) -> "RunOptions":
        """Fill ``threads`` with the usable cores when it is None."""
        return dataclasses.replace(self, threads=usable_cores()) if self.threads is None else self

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able dict of every field."""
        return dataclasses.asdict(self)


def _names(cls) -> tuple[str, ...]:
    return tuple(f.name for f in fields(cls))


#: Keys of a flat mapping of options: map content first, then run options.
CONTENT_KEYS = _names(BakeSettings)
RUN_KEYS = _names(RunOptions)
OPTION_KEYS = CONTENT_KEYS + RUN_KEYS


def split_options(values: Mapping[str, Any], where: str = "settings") -> tuple[dict[str, Any], dict[str, Any]]:
    """Split one flat mapping into (map content, run options) keyword dicts, naming unknown keys."""
    _check_keys(values, OPTION_KEYS, where)
    content = {k: v for k, v in values.items() if k in CONTENT_KEYS}
    run = {k: v for k, v in values.items() if k in RUN_KEYS}
    return content, run


def settings_from_mapping(values: Mapping[str, Any], where: str = "settings") -> tuple[BakeSettings, RunOptions]:
    """Validated (BakeSettings, RunOptions) from one flat mapping (command line, rules table, keywords)."""
    content, run = split_options(values, where)
    settings, options = BakeSettings(**content), RunOptions(**run)
    check_memory(settings, options)
    return settings, options


def check_memory(settings: BakeSettings, run: RunOptions) -> None:
    """Refuse a bake whose estimated peak memory (:func:`estimate_bytes`) is over the cap."""
    est = estimate_bytes(*settings.size, run.chunk_rays)
    if est > MEMORY_CAP_BYTES:
        raise ThickbakeError(
            f"a {settings.size[0]}x{settings.size[1]} map needs about {est / 1024**3:.1f} GiB, over the "
            f"{MEMORY_CAP_BYTES / 1024**3:.0f} GiB cap",
            fix="bake a smaller size (4096x4096 needs about 1.1 GiB)",
        )


def _check_keys(values: Mapping[str, Any], allowed: tuple[str, ...], where: str) -> None:
    unknown = sorted(set(values) - set(allowed))
    if unknown:
        raise ThickbakeError(
            f"unknown setting {', '.join(repr(k) for k in unknown)} in {where}",
            fix=f"allowed settings: {', '.join(sorted(allowed))}",
        )


#: Content fields that enter :meth:`BakeSettings.content_hash` only when they differ from these
#: defaults (added after hashes were recorded in batch sidecars).
OPTIONAL_CONTENT_DEFAULTS = {"medium": None, "scene_unit": None, "uv_set": 0, "blockers": "all"}
OPTIONAL_CONTENT_KEYS = tuple(OPTIONAL_CONTENT_DEFAULTS)

#: ``reach = "fit"`` encodes with this percentile of the covered texels' values: the few texels in
#: a thick core or behind a rim would otherwise set the scale for all; 0.5% of the texels clipped
#: to the top code keeps the rest at full precision.  Common practice, no published source.
FIT_PERCENTILE = 99.5


def parse_reach(value) -> float | str | None:
    """A reach as given: a length in scene units, ``"N%"`` of the bounding-box diagonal, or ``"fit"``."""
    if value is None or _is_real(value):
        return value
    if isinstance(value, str):
        text = value.strip().lower()
        if text == "fit":
            return "fit"
        try:
            if text.endswith("%"):
                share = float(text[:-1])
                if math.isfinite(share) and share > 0:
                    return f"{share:g}%"
            else:
                return float(text)
        except ValueError:
            pass
    raise ThickbakeError(f"setting reach = {value!r} is not allowed",
                         fix="give a length in scene units, a share of the bounding-box diagonal such as '30%', or 'fit'")


def _check_reach(obj) -> None:
    value = parse_reach(obj.reach)
    object.__setattr__(obj, "reach", value)
    if isinstance(value, str):
        if value == "fit" and obj.measure != "thickness":
            raise ThickbakeError(f"reach = 'fit' only applies to the thickness measure, not {obj.measure}",
                                 fix="give a length or a share such as '30%'")
        return
    _check_optional_positive(obj, "reach")


def _check_medium(obj) -> None:
    if obj.medium is None:
        if obj.scene_unit is not None:
            from thickbake.media import parse_scene_unit

            parse_scene_unit(obj.scene_unit)
        return
    from thickbake.media import get_medium, parse_scene_unit

    object.__setattr__(obj, "medium", get_medium(obj.medium).name.lower())
    if obj.measure != "thickness" or obj.invert:
        raise ThickbakeError("a medium turns the baked thickness into RGB transmittance",
                             fix="leave --measure at thickness and --invert off with --medium")
    if obj.scene_unit is not None:
        parse_scene_unit(obj.scene_unit)


def _bad(name: str, value: Any, allowed: str) -> ThickbakeError:
    shown = repr(value)
    if len(shown) > 40:
        shown = shown[:30] + "..." + shown[-6:]
    return ThickbakeError(f"setting {name} = {shown} is not allowed", fix=f"use {allowed}")


def _check_choice(obj, name: str, choices: tuple[str, ...]) -> None:
    value = getattr(obj, name)
    if value not in choices:
        raise _bad(name, value, " or ".join(repr(c) for c in choices))


def _is_int(value) -> bool:
    """A whole number: int or numpy integer, not bool (numbers.Integral covers numpy's integer scalars)."""
    return isinstance(value, numbers.Integral) and not isinstance(value, (bool, np_bool()))


def _is_real(value) -> bool:
    """A real number: int, float or a numpy integer/floating scalar, not bool."""
    return isinstance(value, numbers.Real) and not isinstance(value, (bool, np_bool()))


def np_bool():
    """numpy's bool scalar type, or bool when numpy is not loaded (it is never registered as a number)."""
    import sys

    numpy = sys.modules.get("numpy")
    return numpy.bool_ if numpy is not None else bool


def _finite(value) -> bool:
    try:
        return math.isfinite(value)
    except OverflowError:  # an int too large for a float
        return False


def _check_int(obj, name: str, low: int, high: int) -> None:
    value = getattr(obj, name)
    if not _is_int(value) or not (low <= value <= high):
        raise _bad(name, value, f"a whole number from {low} to {high}")
    object.__setattr__(obj, name, int(value))


def _check_float(obj, name: str, low: float, high: float, inclusive_low: bool) -> None:
    value = getattr(obj, name)
    if not _is_real(value) or not _finite(value) or value > high or value < low or (value == low and not inclusive_low):
        allowed = f"a number from {low:g} to {high:g}" if math.isfinite(high) else f"a finite number ≥ {low:g}"
        raise _bad(name, value, allowed)
    object.__setattr__(obj, name, float(value))


def _check_optional_positive(obj, name: str) -> None:
    value = getattr(obj, name)
    if value is None:
        return
    if not _is_real(value) or not _finite(value) or value <= 0:
        units = "the measure's units" if name == "target_error" else "scene units"
        raise _bad(name, value, f"a positive number in {units}")
    object.__setattr__(obj, name, float(value))


__all__ = ["BakeSettings", "RunOptions", "settings_from_mapping", "split_options", "check_memory", "MEASURES", "LOBES",
           "SEQUENCES", "ORDERS", "CONTENT_KEYS", "RUN_KEYS", "OPTION_KEYS", "default_pad", "parse_size",
           "parse_blockers", "estimate_bytes", "FIT_PERCENTILE", "parse_reach"]
