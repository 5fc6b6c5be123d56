"""The sidecar: the one JSON schema that says what a map holds and how to decode it, written and read here.

Every map ``OUT.png`` / ``OUT.tif`` has ``OUT.json`` beside it.  This module builds that dict from a
bake's figures (:func:`build_sidecar`, plus :func:`with_error_map` and :func:`with_batch_record` for
the optional parts) and reads it back into a typed, validated :class:`Sidecar` (:func:`read_sidecar`:
the decode, ``map_of``, ``medium``, ...) or, for a packed image, :class:`PackedSidecar`
(:func:`parse_any_sidecar`); nothing else in the package writes or parses sidecar fields, and a bad
field reads as the same one-line error wherever it is read.

Schema (the keys this module gives meaning to; the rest are the bake's figures, see README)
------------------------------------------------------------------------------------------
``thickbake_version`` str, ``map`` str (the map's file name), ``measure`` (a name of
:data:`thickbake.measures.MEASURES`), ``units``, ``reach`` (scene units), ``coverage`` (share of
texels), ``input`` {``file``, ``sha256``}, ``settings`` (map content), ``settings_hash``, ``run``
(threads, chunk_rays, order), ``color_space`` ("linear") and

* ``encoding``: ``format`` (text), ``code_max`` (255 or 65535 for a PNG, null for a float TIFF),
  ``offset`` and ``scale`` with ``measure = offset + scale · code / code_max`` (a TIFF or EXR stores
  the measure itself: offset 0, scale 1), ``formula`` (the same in words), for an EXR ``sample_type``;
  a bake with a ``medium`` stores RGB transmittance instead (see :func:`medium_encoding_entry`);
* ``gltf_hint`` (uninverted thickness PNGs): how KHR_materials_volume uses the map;
* ``error_map``: file name of the standard-error TIFF, when one was written;
* ``transfer`` (bakes measured in a source solid, :mod:`thickbake.pipeline.transfer`): ``sources``
  [{``file``, ``sha256``, ``watertight``, ...}], ``mode`` ("search distance" or "cage"),
  ``search_distance`` (scene units) or ``cage`` {``file``, ``sha256``}, ``layout_texels``,
  ``unprojected_texels``, ``unprojected_share``, ``unprojected_samples``, ``samples`` and
  ``distance`` {``p50``, ``p95``, ``max``} (target-to-source distance, scene units);
  ``unprojected_mask``: file name of the 8-bit mask of the unprojected texels, when one was written;
* ``batch``: ``source``, ``requested_settings_hash``, ``inputs_sha256``, ``rules``, ``map_sha256``,
  ``maps`` (every map file of the asset) and ``outputs`` (delivery file name → sha256, when there are
  any): what :mod:`thickbake.batch.plan` needs to tell whether the maps are up to date (it finds an
  asset's sidecars with :func:`read_batch_sidecar`);
* ``packed_into`` (a bake with ``--pack-into``): {``image``, ``channels`` {channel: measure}, ``bits``,
  ``existed``}, from :func:`packed_record`;
* ``map_sha256``: sha256 of the map file's bytes, added by :func:`with_map_checksum` when the pair is
  written.  The map is renamed into place before its sidecar, so a run killed between the two
  renames leaves a new map beside the old sidecar; readers (:meth:`Sidecar.check_map`) refuse such a
  pair instead of decoding the new map with the old numbers.

A packed RGBA image (``IMAGE.png`` holding several maps, one per channel) has ``IMAGE.json`` of another
shape, built by :func:`packed_sidecar`: ``thickbake_version``, ``image`` (its file name),
``color_space``, ``bits`` and ``channels`` {``r`` | ``g`` | ``b`` | ``a``: :func:`channel_entry`, i.e.
``measure``, ``units``, ``reach``, ``inverted``, ``input``, ``settings_hash`` and ``encoding``
{``code_max``, ``offset``, ``scale``, ``formula``}}.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from thickbake.errors import ThickbakeError
from thickbake.maps.encode import decode, decode_coefficients
from thickbake.measures import MEASURES, Measure, measure_named

SIDECAR_SUFFIX = ".json"
#: A sidecar is a few kilobytes; anything over this is not one.
SIDECAR_MAX_BYTES = 16 * 1024**2
#: The integer code ranges a PNG map may have, by bit depth, and the image type each is stored in.
CODE_MAX = {8: 255, 16: 65535}
#: The channels of a packed image, in the order its sidecar lists them.
PACKED_CHANNELS = "rgba"
_CODE_DTYPE = {255: np.uint8, 65535: np.uint16}


def sidecar_path(map_path: str | os.PathLike) -> Path:
    """The sidecar of ``OUT.png`` is ``OUT.json``."""
    return Path(map_path).with_suffix(SIDECAR_SUFFIX)


# ---------------------------------------------------------------------------- writing
def encoding_entry(suffix: str, measure: str | Measure, reach: float, invert: bool, bits: int) -> dict:
    """The ``encoding`` entry of a one-channel map file of this suffix (PNG codes, EXR or float TIFF)."""
    name = measure_named(measure).name
    suffix = suffix.lower()
    if suffix == ".png":
        offset, scale = decode_coefficients(measure, reach, invert)
        top = (1 << bits) - 1
        return {
            "format": f"PNG, {bits}-bit grayscale",
            "code_max": top,
            "offset": offset,
            "scale": scale,
            "formula": f"{name} = {offset:g} + {scale:g} * code / {top}",
        }
    if suffix == ".exr":
        return {
            "format": "OpenEXR, one channel Y (half or float, see the file's header)",
            "code_max": None, "offset": 0.0, "scale": 1.0,
            "formula": f"{name} = value (no scaling, not inverted)",
        }
    return {
        "format": "TIFF, 32-bit float, one channel",
        "code_max": None, "offset": 0.0, "scale": 1.0,
        "formula": f"{name} = value (no scaling, not inverted)",
    }


def medium_encoding_entry(suffix: str, bits: int) -> dict:
    """The ``encoding`` entry of an RGB transmittance map (a bake with a medium): PNG codes or EXR."""
    if suffix.lower() == ".png":
        top = (1 << bits) - 1
        return {"format": f"PNG, {bits}-bit RGB", "code_max": top, "offset": 0.0, "scale": 1.0,
                "formula": f"T_channel = code_channel / {top}"}
    return {"format": "OpenEXR, channels R G B (half or float, see the file's header)", "code_max": None,
            "offset": 0.0, "scale": 1.0, "formula": "T_channel = value"}


def build_sidecar(map_name: str, info: dict, measure: str | Measure, reach: float, invert: bool, bits: int,
                  version: str) -> dict:
    """The sidecar of a map called ``map_name`` (its suffix picks the encoding).

    Parameters
    ----------
    map_name : str
        File name of the map.
    info : dict
        The bake's figures (``BakeResult.info``), copied in after ``thickbake_version`` and ``map``; a
        ``medium`` entry makes the map RGB transmittance.
    measure, reach, invert, bits
        The resolved settings that decide the encoding (reach in scene units).
    version : str
        The thickbake version that baked the map.
    """
    suffix = Path(map_name).suffix.lower()
    data = {"thickbake_version": version, "map": Path(map_name).name}
    data.update(info)
    data["color_space"] = "linear"
    if "medium" in info:
        data["encoding"] = medium_encoding_entry(suffix, bits)
        return data
    data["encoding"] = encoding_entry(suffix, measure, reach, invert, bits)
    if measure_named(measure).name == "thickness" and not invert and suffix == ".png":
        data["gltf_hint"] = gltf_hint(reach, info.get("local_units"))
    return data


def gltf_hint(reach: float, local_units: dict | None) -> dict:
    """The KHR_materials_volume hint of a non-inverted thickness PNG.

    glTF thickness is in the mesh's own coordinate space, so the world reach of the top code is
    divided by the node scale of the map's faces (``local_units["world_per_local"]``, see
    :func:`thickbake.pipeline.groups.local_units`); with no single scale there is no factor.
    """
    units = local_units or {}
    scale = units.get("world_per_local", 1.0) if units else 1.0
    hint = {
        "extension": "KHR_materials_volume",
        "thicknessTexture": "this map; glTF reads thickness from the G channel, which a grayscale image fills",
        "thicknessFactor": float(reach) / scale if scale else None,
        "units": "the mesh's own coordinate space (world thickness divided by the node scale)",
        "node_scales": units.get("node_scales", [1.0]),
    }
    if hint["thicknessFactor"] is None:
        hint["why_no_factor"] = units.get("why")
    return hint


def with_exr_sample_type(sidecar: dict, sample_type: str) -> dict:
    """Record an EXR map's sample type (``"half"`` or ``"float"``) in its ``encoding`` entry."""
    return {**sidecar, "encoding": {**sidecar["encoding"], "sample_type": sample_type}}


def with_error_map(sidecar: dict, error_map: str | os.PathLike) -> dict:
    """The sidecar naming the standard-error TIFF written beside the map."""
    return {**sidecar, "error_map": Path(error_map).name}


def with_unprojected_mask(sidecar: dict, mask: str | os.PathLike) -> dict:
    """The sidecar naming the 8-bit mask of a transfer bake's unprojected texels, written beside the map."""
    return {**sidecar, "unprojected_mask": Path(mask).name}


def with_map_checksum(sidecar: dict, map_bytes: bytes) -> dict:
    """The sidecar recording the sha256 of the map file's bytes (``map_sha256``)."""
    return {**sidecar, "map_sha256": hashlib.sha256(map_bytes).hexdigest()}


def with_batch_record(sidecar: dict, record: dict, map_bytes: bytes) -> dict:
    """The sidecar with a batch's bookkeeping (``record`` plus the sha256 of the map's bytes)."""
    return {**sidecar, "batch": dict(record, map_sha256=hashlib.sha256(map_bytes).hexdigest())}


def channel_entry(measure: str | Measure, units: str, reach: float, invert: bool, source: dict, settings_hash: str,
                  bits: int) -> dict:
    """The entry of one channel of a packed image (``channels.r`` …): what the channel holds and how to decode it.

    Parameters
    ----------
    measure, reach, invert
        The settings of the map packed there (reach in scene units).
    units : str
        The measure's units as the map's own sidecar gives them (``info["units"]``).
    source : dict
        The map's ``input`` entry ({``file``, ``sha256``}).
    settings_hash : str
        The map's ``settings_hash``.
    bits : {8, 16}
        The packed image's bit depth (an existing image keeps its own).
    """
    encoding = encoding_entry(".png", measure, reach, invert, bits)
    del encoding["format"]  # the packed image's format is said once, by its own ``bits``
    return {"measure": measure_named(measure).name, "units": units, "reach": reach, "inverted": invert,
            "input": source, "settings_hash": settings_hash, "encoding": encoding}


def packed_sidecar(image: str | os.PathLike, entries: dict[str, dict], bits: int, version: str,
                   keep_earlier: bool = True) -> dict:
    """The sidecar of a packed RGBA image: one :func:`channel_entry` per channel, in r, g, b, a order.

    Parameters
    ----------
    image : str or os.PathLike
        The packed PNG; its sidecar (:func:`sidecar_path`) is read for the earlier entries.
    entries : {channel: dict}
        The channels written now.
    bits : {8, 16}
        The image's bit depth.
    version : str
        The thickbake version that packed it.
    keep_earlier : bool
        Keep the entries of channels not written now from the image's existing sidecar, when that
        sidecar describes this image (an unreadable one is ignored: the image is being rewritten).
    """
    image = Path(image)
    channels = dict(_earlier_channels(image)) if keep_earlier else {}
    channels.update(entries)
    return {"thickbake_version": version, "image": image.name, "color_space": "linear", "bits": bits,
            "channels": {k: channels[k] for k in PACKED_CHANNELS if k in channels}}


def packed_record(image: str | os.PathLike, channels: list[tuple[str, str]], bits: int, existed: bool) -> dict:
    """The ``packed_into`` entry of a map's own sidecar: which image, which (channel, measure) pairs,
    the image's bit depth and whether it existed before."""
    return {"image": Path(image).name, "channels": {c: m for c, m in channels}, "bits": bits, "existed": existed}


def _earlier_channels(image: Path) -> dict:
    """The ``channels`` of the existing sidecar of a packed ``image`` ({} when there is none, it is
    unreadable or it describes another image)."""
    side = sidecar_path(image)
    if not side.is_file():
        return {}
    try:
        old = load_sidecar_json(side)
    except ThickbakeError:
        return {}
    if isinstance(old, dict) and old.get("image") == image.name and isinstance(old.get("channels"), dict):
        return old["channels"]
    return {}


# ---------------------------------------------------------------------------- reading
@dataclass(frozen=True)
class Encoding:
    """How a map's pixels decode to measure units (the sidecar's ``encoding``).

    Attributes
    ----------
    code_max : int or None
        255 or 65535 for a PNG of codes; None for a float TIFF of the measure itself.
    offset, scale : float
        measure = offset + scale · code / code_max (a TIFF: offset + scale · value).
    """

    code_max: int | None
    offset: float
    scale: float

    @classmethod
    def of(cls, suffix: str, measure: str | Measure, reach: float, invert: bool, bits: int) -> "Encoding":
        """The encoding :func:`build_sidecar` records for a map file of this suffix."""
        entry = encoding_entry(suffix, measure, reach, invert, bits)
        return cls(entry["code_max"], entry["offset"], entry["scale"])

    @property
    def bits(self) -> int | None:
        return None if self.code_max is None else (8 if self.code_max == 255 else 16)

    @property
    def kind(self) -> str:
        return "float TIFF" if self.code_max is None else f"{self.bits}-bit PNG"

    @property
    def step(self) -> float:
        """One code step in measure units (0 for a float TIFF)."""
        return 0.0 if self.code_max is None else abs(self.scale) / self.code_max

    def decode(self, image: np.ndarray, path: str | os.PathLike) -> np.ndarray:
        """(h, w) float64 measure values of a map image, after checking it matches this encoding."""
        if self.code_max is None:
            if image.dtype.kind != "f":
                raise ThickbakeError(f"the sidecar describes a float map but the image holds {image.dtype} codes",
                                     path=path, fix="keep each map with the sidecar written beside it")
            return self.offset + self.scale * image.astype(np.float64)
        if image.dtype != _CODE_DTYPE[self.code_max]:
            raise ThickbakeError(f"the sidecar says codes go to {self.code_max} but the image holds {image.dtype}",
                                 path=path, fix="keep each map with the sidecar written beside it")
        return decode(image, self.offset, self.scale, self.bits)


@dataclass(frozen=True)
class BatchRecord:
    """The ``batch`` entry: what a batch run compares to decide the map is up to date.

    Attributes
    ----------
    requested_settings_hash, inputs_sha256, map_sha256 : str or None
    maps : tuple of str or None
        File names (in the sidecar's folder) of every map of the asset, one per material, UV set and
        tile; None when the entry lists none, or not as a list of plain file names.
    outputs : dict or None
        Delivery file name → its sha256, when the batch wrote delivery files.
    """

    requested_settings_hash: str | None
    inputs_sha256: str | None
    map_sha256: str | None
    maps: tuple[str, ...] | None = None
    outputs: dict | None = None


def batch_record(data: Any) -> BatchRecord | None:
    """The ``batch`` entry of sidecar content (any JSON value), or None when it has none.

    Lenient: a field of the wrong type reads as None, nothing else of the sidecar is checked.
    """
    batch = data.get("batch") if isinstance(data, dict) else None
    if not isinstance(batch, dict):
        return None
    maps = batch.get("maps")
    plain = isinstance(maps, list) and maps and all(isinstance(m, str) and m == Path(m).name != "" for m in maps)
    maps = tuple(maps) if plain else None  # file names beside the sidecar, never a path elsewhere
    outputs = batch.get("outputs") if isinstance(batch.get("outputs"), dict) else None
    return BatchRecord(_text(batch.get("requested_settings_hash")), _text(batch.get("inputs_sha256")),
                       _text(batch.get("map_sha256")), maps, outputs)


@dataclass(frozen=True)
class MapOf:
    """The ``map_of`` entry: which part of the asset a map holds.

    Attributes
    ----------
    material : str, int or None
        The material's name, its index in the file when unnamed, None for faces without a material.
    uv_set : int
        UV channel (0 when the entry gives none).
    tile : int or None
        UDIM tile (1001 …), None for the 0–1 square.
    """

    material: str | int | None
    uv_set: int
    tile: int | None

    def to_dict(self) -> dict:
        """The entry as the sidecar stores it."""
        return {"material": self.material, "uv_set": self.uv_set, "tile": self.tile}


def read_map_of(data: dict, path: str | os.PathLike) -> MapOf | None:
    """The ``map_of`` entry of sidecar content, or None when it has none (a map of the whole asset).

    Raises
    ------
    ThickbakeError
        A field has the wrong type, named as :func:`parse_sidecar` names every bad field.
    """
    path = Path(path)
    entry = data.get("map_of")
    if entry is None:
        return None
    if not isinstance(entry, dict):
        raise _bad_field(path, "map_of", entry, "an object with material, uv_set and tile")
    material = entry.get("material")
    if material is not None and (isinstance(material, bool) or not isinstance(material, (str, int))):
        raise _bad_field(path, "map_of.material", material, "a material name, a material index or null")
    uv_set = entry.get("uv_set")
    if uv_set is None:
        uv_set = 0
    elif isinstance(uv_set, bool) or not isinstance(uv_set, int) or uv_set < 0:
        raise _bad_field(path, "map_of.uv_set", uv_set, "a UV set number (0, 1, ...)")
    tile = entry.get("tile")
    if tile is not None and (isinstance(tile, bool) or not isinstance(tile, int) or tile < 1001):
        raise _bad_field(path, "map_of.tile", tile, "a UDIM tile number (1001 ...) or null")
    return MapOf(material, uv_set, tile)


@dataclass(frozen=True)
class MediumRecord:
    """What a reader needs of the ``medium`` entry of a bake through a measured medium.

    Attributes
    ----------
    sigma_tr_per_mm : tuple of float
        Transport coefficient per millimetre, per colour channel (R, G, B).
    mm_per_unit : float
        Millimetres per scene unit.
    """

    sigma_tr_per_mm: tuple[float, ...]
    mm_per_unit: float

    @property
    def sigma_per_unit(self) -> list[float]:
        """Transport coefficient per scene unit, per colour channel (at most three)."""
        return [s * self.mm_per_unit for s in self.sigma_tr_per_mm][:3]


def read_medium(data: dict, path: str | os.PathLike) -> MediumRecord | None:
    """The ``medium`` entry of sidecar content, or None for a bake without a medium.

    Raises
    ------
    ThickbakeError
        A field a reader needs is missing or has the wrong type (named as :func:`parse_sidecar` does).
    """
    path = Path(path)
    entry = data.get("medium")
    if entry is None:
        return None
    if not isinstance(entry, dict):
        raise _bad_field(path, "medium", entry, "an object (the measured medium of the bake)")
    sigma = entry.get("sigma_tr_per_mm")
    if not isinstance(sigma, list) or not sigma:
        raise _bad_field(path, "medium.sigma_tr_per_mm", sigma, "a list of finite numbers per mm (R, G, B)")
    sigma = tuple(_number(v, path, "medium.sigma_tr_per_mm") for v in sigma)
    mm_per_unit = _number(entry.get("mm_per_unit"), path, "medium.mm_per_unit")
    if not mm_per_unit > 0:
        raise _bad_field(path, "medium.mm_per_unit", mm_per_unit, "a positive number of millimetres")
    return MediumRecord(sigma, mm_per_unit)


@dataclass(frozen=True)
class Sidecar:
    """A validated sidecar.

    Attributes
    ----------
    path : Path
        The ``.json`` file.
    measure : Measure
    reach : float or None
        Scene units.
    encoding : Encoding
    coverage : float or None
        Share of covered texels.
    version : str or None
        thickbake version that wrote it.
    map_name : str or None
        File name of the map it describes.
    input_sha256 : str or None
        sha256 of the mesh file baked.
    batch : BatchRecord or None
    map_sha256 : str or None
        sha256 of the map file the sidecar was written with (None in sidecars older than the field).
    units : str or None
        The measure's units as the bake wrote them.
    map_of : MapOf or None
        The part of the asset the map holds; None for a sidecar without ``map_of`` (the whole asset on
        UV set 0).
    medium : MediumRecord or None
        The measured medium of a medium bake.
    data : dict
        Everything, as read (the bake's figures for reports).
    """

    path: Path
    measure: Measure
    reach: float | None
    encoding: Encoding
    coverage: float | None
    version: str | None
    map_name: str | None
    input_sha256: str | None
    batch: BatchRecord | None
    data: dict
    map_sha256: str | None = None
    units: str | None = None
    map_of: MapOf | None = None
    medium: MediumRecord | None = None

    def check_map(self, map_path: str | os.PathLike) -> None:
        """Refuse a map whose bytes are not the ones this sidecar was written with.

        Raises
        ------
        ThickbakeError
            The pair is inconsistent (a bake interrupted between its two renames, or a file
            replaced): bake again.  Sidecars without ``map_sha256`` pass.
        """
        if self.map_sha256 is None:
            return
        from thickbake.inputs import read_regular_file

        if hashlib.sha256(read_regular_file(map_path, what="map")).hexdigest() != self.map_sha256:
            raise ThickbakeError(
                f"the map and its sidecar {self.path.name} do not belong together (the map's sha256 is not the one "
                "the sidecar records: a bake was interrupted between writing them, or one was replaced)",
                path=map_path, fix="bake the map again to write a consistent pair")

    @property
    def full_scale(self) -> float:
        """The measure's full-scale range: the reach for thickness (1 when it is missing), else 1."""
        return self.measure.full_scale(self.reach) if self.reach else 1.0


def read_sidecar(map_path: str | os.PathLike) -> Sidecar:
    """Load and validate the sidecar of a map.

    Raises
    ------
    ThickbakeError
        The sidecar is missing, not JSON, or a field the map's decoding needs is missing or has the
        wrong type (e.g. ``code_max`` "abc"): naming the field and the fix.
    """
    side = sidecar_path(map_path)
    return parse_sidecar(load_sidecar_json(side), side)


def load_sidecar_json(side: str | os.PathLike):
    """The decoded JSON of the sidecar file ``side`` (any JSON value; :func:`parse_sidecar` checks its fields).

    Raises
    ------
    ThickbakeError
        The file is missing, not a regular file (a FIFO or folder is never opened), over
        :data:`SIDECAR_MAX_BYTES`, or not JSON.
    """
    from thickbake.inputs import check_regular_file

    side = Path(side)
    if side.exists() or side.is_symlink():
        check_regular_file(side, what="sidecar", max_bytes=SIDECAR_MAX_BYTES)  # never a FIFO or a folder
    try:
        return json.loads(side.read_text("utf-8"))
    except FileNotFoundError:
        raise ThickbakeError("the map has no sidecar", path=side,
                             fix="keep the .json written next to each map by 'thickbake bake'") from None
    except (OSError, ValueError) as exc:
        raise ThickbakeError(f"the sidecar is not valid JSON ({exc})", path=side, fix="bake the map again") from None


def read_batch_sidecar(side: str | os.PathLike, source: str) -> dict | None:
    """The content of the sidecar file ``side`` when a batch wrote it for the asset ``source`` (its
    ``batch.source``, the asset's path relative to the batch's source folder), else None.

    Lenient on purpose: the batch uses it to find an asset's maps, and checks each with
    :func:`parse_sidecar` before trusting it.

    Raises
    ------
    ThickbakeError
        The file cannot be read as JSON (see :func:`load_sidecar_json`).
    """
    data = load_sidecar_json(side)
    batch = data.get("batch") if isinstance(data, dict) else None
    return data if isinstance(batch, dict) and batch.get("source") == source else None


def parse_sidecar(data: Any, path: str | os.PathLike) -> Sidecar:
    """Validate a sidecar dict (see :func:`read_sidecar`); ``path`` names the file in errors."""
    path = Path(path)
    if not isinstance(data, dict):
        raise ThickbakeError("the sidecar is not a JSON object", path=path, fix="bake the map again")
    measure = _measure(data, path, "")
    if not isinstance(data.get("encoding"), dict):
        raise ThickbakeError("the sidecar has no encoding", path=path, fix="use a map written by 'thickbake bake'")
    encoding = _encoding(data["encoding"], path, "encoding")
    reach = _reach(data, path, "")
    coverage = data.get("coverage")
    coverage = None if coverage is None else _number(coverage, path, "coverage")
    source = data.get("input") if isinstance(data.get("input"), dict) else {}
    return Sidecar(path=path, measure=measure, reach=reach, encoding=encoding, coverage=coverage,
                   version=_text(data.get("thickbake_version")), map_name=_text(data.get("map")),
                   input_sha256=_text(source.get("sha256")), batch=batch_record(data), data=data,
                   map_sha256=_text(data.get("map_sha256")), units=_text(data.get("units")),
                   map_of=read_map_of(data, path), medium=read_medium(data, path))


@dataclass(frozen=True)
class Channel:
    """One channel of a packed image (its sidecar's ``channels.r`` …, see :func:`channel_entry`).

    Attributes
    ----------
    measure : Measure
    units : str or None
    reach : float or None
        Scene units.
    inverted : bool
    encoding : Encoding
        The channel's codes (the packed image's bit depth).
    """

    measure: Measure
    units: str | None
    reach: float | None
    inverted: bool
    encoding: Encoding


@dataclass(frozen=True)
class PackedSidecar:
    """A validated sidecar of a packed RGBA image (:func:`packed_sidecar`).

    Attributes
    ----------
    path : Path
        The ``.json`` file.
    image : str or None
        File name of the packed image.
    channels : {str: Channel}
        The channels it describes (``r``, ``g``, ``b``, ``a``), in the sidecar's order.
    data : dict
        Everything, as read.
    """

    path: Path
    image: str | None
    channels: dict[str, Channel]
    data: dict


def is_packed(data: Any) -> bool:
    """Whether sidecar content (any JSON value) describes a packed image (it has a ``channels`` block)."""
    return isinstance(data, dict) and isinstance(data.get("channels"), dict)


def parse_packed_sidecar(data: Any, path: str | os.PathLike) -> PackedSidecar:
    """Validate the sidecar of a packed image; ``path`` names the file in errors.

    Entries under other names than r, g, b, a are left out.

    Raises
    ------
    ThickbakeError
        A channel's field a reader needs is missing or has the wrong type, named like
        ``channels.r.encoding.offset`` (as :func:`parse_sidecar` names every bad field).
    """
    path = Path(path)
    if not is_packed(data):
        raise _bad_field(path, "channels", data.get("channels") if isinstance(data, dict) else None,
                         "an object with one entry per channel (r, g, b, a)")
    channels = {}
    for name, entry in data["channels"].items():
        if name not in PACKED_CHANNELS:
            continue
        where = f"channels.{name}"
        if not isinstance(entry, dict):
            raise _bad_field(path, where, entry, "an object (what the channel holds and how to decode it)")
        if not isinstance(entry.get("encoding"), dict):
            raise _bad_field(path, f"{where}.encoding", entry.get("encoding"),
                             "an object with code_max, offset and scale")
        channels[name] = Channel(measure=_measure(entry, path, f"{where}."), units=_text(entry.get("units")),
                                 reach=_reach(entry, path, f"{where}."), inverted=entry.get("inverted") is True,
                                 encoding=_encoding(entry["encoding"], path, f"{where}.encoding"))
    return PackedSidecar(path=path, image=_text(data.get("image")), channels=channels, data=data)


def parse_any_sidecar(data: Any, path: str | os.PathLike) -> Sidecar | PackedSidecar:
    """Validate a map's sidecar (:func:`parse_sidecar`) or a packed image's (:func:`parse_packed_sidecar`)."""
    return parse_packed_sidecar(data, path) if is_packed(data) else parse_sidecar(data, path)


def _measure(entry: dict, path: Path, prefix: str) -> Measure:
    measure = entry.get("measure")
    if measure not in MEASURES:
        raise _bad_field(path, f"{prefix}measure", measure, " or ".join(repr(m) for m in MEASURES))
    return measure_named(measure)


def _reach(entry: dict, path: Path, prefix: str) -> float | None:
    reach = entry.get("reach")
    if reach is not None:
        reach = _number(reach, path, f"{prefix}reach")
        if not reach > 0:
            raise _bad_field(path, f"{prefix}reach", reach, "a positive length in scene units")
    return reach


def _encoding(entry: dict, path: Path, where: str) -> Encoding:
    """The :class:`Encoding` of an ``encoding`` object found at ``where`` (a field name for errors)."""
    code_max = entry.get("code_max")
    if code_max is not None and (isinstance(code_max, bool) or code_max not in _CODE_DTYPE):
        raise _bad_field(path, f"{where}.code_max", code_max, "255 or 65535 (a PNG) or null (a float TIFF)")
    offset = _number(entry.get("offset"), path, f"{where}.offset")
    scale = _number(entry.get("scale"), path, f"{where}.scale")
    return Encoding(None if code_max is None else int(code_max), offset, scale)


#: The fields that decode a map and nothing that changes from run to run (no timings, so the same bake
#: gives the same bytes): what a map file that carries its own decode information copies.
DECODE_KEYS = ("measure", "units", "encoding", "reach", "inverted", "color_space", "medium", "settings_hash",
               "input", "size")


def decode_attributes(sidecar: dict) -> dict:
    """A sidecar's decode information as flat header attributes (str or float) for a map file that
    carries its own (an EXR, :func:`thickbake.maps.exr.sidecar_attributes`): ``thickbake_measure``,
    ``thickbake_units``, ``thickbake_formula``, ``thickbake_reach``, ``thickbake_color_space`` and
    ``thickbake_decode`` (the :data:`DECODE_KEYS` fields as sorted JSON)."""
    return {"thickbake_measure": str(sidecar.get("measure")), "thickbake_units": str(sidecar.get("units")),
            "thickbake_formula": str(sidecar.get("encoding", {}).get("formula")),
            "thickbake_reach": float(sidecar.get("reach") or 0.0), "thickbake_color_space": "linear",
            "thickbake_decode": json.dumps({k: sidecar[k] for k in DECODE_KEYS if k in sidecar},
                                           sort_keys=True, allow_nan=False)}


def described_map(sidecar_file: str | os.PathLike) -> str | None:
    """The ``map`` an existing sidecar names, or None when it is missing, unreadable or names none.

    Lenient on purpose: used before writing, to refuse overwriting the sidecar of a *different* map.
    """
    try:
        other = json.loads(Path(sidecar_file).read_text("utf-8")).get("map")
    except (OSError, ValueError, AttributeError):
        return None
    return other if isinstance(other, str) else None


def _number(value: Any, path: Path, name: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise _bad_field(path, name, value, "a finite number")
    return float(value)


def _text(value: Any) -> str | None:
    return value if isinstance(value, str) else None


def _bad_field(path: Path, name: str, value: Any, allowed: str) -> ThickbakeError:
    shown = repr(value) if value is not None else "missing"
    return ThickbakeError(f"the sidecar's {name} is {shown}, not {allowed}", path=path,
                          fix="keep the sidecar 'thickbake bake' wrote beside the map, or bake the map again")


__all__ = ["SIDECAR_SUFFIX", "sidecar_path", "encoding_entry", "medium_encoding_entry", "build_sidecar", "gltf_hint",
           "with_exr_sample_type", "with_error_map", "with_unprojected_mask", "with_batch_record", "with_map_checksum", "channel_entry", "packed_sidecar",
           "packed_record", "Encoding", "BatchRecord", "batch_record", "MapOf", "read_map_of", "MediumRecord",
           "read_medium", "Sidecar", "read_sidecar", "parse_sidecar", "Channel", "PackedSidecar", "is_packed",
           "parse_packed_sidecar", "parse_any_sidecar", "read_batch_sidecar", "DECODE_KEYS", "decode_attributes",
           "described_map"]
