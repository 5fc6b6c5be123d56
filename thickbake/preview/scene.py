"""What a preview shows: the asset's triangles and one entry per map, each decoded by its sidecar.

An entry is one map of one part of the asset — a (material, UV set, UDIM tile) as the sidecar's
``map_of`` block names it (the whole asset on UV set 0 when the sidecar has none) — with the image as
stored and the decode the shader applies:

* ``offset``/``scale``/``code_max`` per channel: measure = offset + scale · code / code_max (a float
  TIFF stores the measure, code_max 1).  An inverted map has offset = full scale and a negative scale,
  so the shader never needs to know about inversion: it trusts the sidecar.
* ``kind``: ``thickness`` (scene units, turned into transmission by exp(−d / attenuation distance),
  or per colour channel by a measured medium's σ_tr) or ``transmission`` (transmittance and the
  occlusion of the inverted surface are already "1 where light passes").
* A packed image (a sidecar with a ``channels`` block) gives one entry per channel.

Nothing here bakes: maps and sidecars are read, checked against the asset and handed on.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from thickbake.errors import ThickbakeError
from thickbake.maps.sidecar import (Encoding, MapOf, MediumRecord, PackedSidecar, Sidecar, load_sidecar_json,
                                    parse_any_sidecar, sidecar_path)

MAP_SUFFIXES = (".png", ".tif", ".tiff", ".exr")
#: Measures whose value is already the share of light that passes (1 = thin).
TRANSMISSION_MEASURES = ("transmittance", "occlusion")
CHANNEL_INDEX = {"r": 0, "g": 1, "b": 2, "a": 3}


@dataclass
class MapEntry:
    """One map over one part of the asset, ready for the page.

    Attributes
    ----------
    label : str
        Shown in the page's lists (file name and what part of the asset it covers).
    stored : (h, w, c) uint8, uint16 or float32
        The image as stored, rows top-down as in the file (row 0 = v 1), c = 1 or 3.
    code_max : float
        The stored value that means 1 (255 or 65535 for integer images, 1 for floats).
    offset, scale : list of float (c values)
        measure = offset + scale · stored / code_max, per channel.
    kind : str
        ``"thickness"`` or ``"transmission"``.
    measure : str
        The sidecar's measure name.
    sigma_per_unit : list of 3 float or None
        A measured medium's transport coefficient per scene unit, per colour channel.
    uv_set : int
    material : str, int or None
    tile : int or None
        UDIM tile (1001 …) or None for the 0–1 square.
    show_range : (float, float)
        Measure values drawn black and white in the map views.
    units : str
    """

    label: str
    path: Path
    stored: np.ndarray
    code_max: float
    offset: list
    scale: list
    kind: str
    measure: str
    sigma_per_unit: list | None
    uv_set: int
    material: object
    tile: int | None
    show_range: tuple
    units: str
    map_of_given: bool = True

    @property
    def tile_offset(self) -> tuple[int, int]:
        """(u, v) of the tile's lower-left corner: UDIM 1001 + u + 10 v (MaterialX v1.39)."""
        if self.tile is None:
            return (0, 0)
        index = int(self.tile) - 1001
        return (index % 10, index // 10)

    def decoded(self) -> np.ndarray:
        """(h, w, c) float64 measure values (the sidecar's formula)."""
        stored = np.asarray(self.stored, np.float64) / float(self.code_max)
        return np.asarray(self.offset) + np.asarray(self.scale) * stored


def resolve_map_argument(arg: str | os.PathLike) -> tuple[Path, Sidecar | PackedSidecar]:
    """A MAP or SIDECAR argument → (image path, its validated sidecar).

    A map's sidecar is read by :func:`thickbake.maps.sidecar.parse_sidecar`, a packed image's (a
    ``channels`` block, one decode per channel) by :func:`thickbake.maps.sidecar.parse_packed_sidecar`.
    """
    path = Path(arg)
    if not path.exists():
        raise ThickbakeError("no such file", path=path, fix="check the path")
    if path.suffix.lower() == ".json":
        side_file = path
    elif path.suffix.lower() in MAP_SUFFIXES:
        side_file = sidecar_path(path)
    else:
        raise ThickbakeError(f"{path.suffix or '(no suffix)'} is not a map", path=path,
                             fix="give maps (.png, .tif, .exr) or their .json sidecars after the asset")
    side = parse_any_sidecar(load_sidecar_json(side_file), side_file)
    if path.suffix.lower() != ".json":
        return path, side
    name = side.image if isinstance(side, PackedSidecar) else side.map_name
    if not name:
        raise ThickbakeError("the sidecar names no map image", path=path, fix="give the map itself")
    image = path.parent / name
    if not image.exists():
        raise ThickbakeError(f"the sidecar's map {name} is missing", path=image, fix="keep the map beside its sidecar")
    return image, side


def _read_pixels(path: Path) -> np.ndarray:
    """(h, w, c) samples of a map image (c = 1, 3 or 4), as stored (16-bit colour PNGs keep 16 bits)."""
    from thickbake.maps.files import read_image

    if path.suffix.lower() == ".png":
        from thickbake.maps.png import decode_png

        try:
            image = np.asarray(decode_png(path.read_bytes()))
        except Exception as exc:  # the decoder raises its own types for broken files
            raise ThickbakeError(f"cannot read the image ({type(exc).__name__})", path=path,
                                 fix="give a PNG written by thickbake") from None
    else:
        image = np.asarray(read_image(path))
    if image.ndim == 2:
        image = image[..., None]
    return image


def entries_of(arg: str | os.PathLike) -> list[MapEntry]:
    """The entries one MAP or SIDECAR argument gives (several for a packed image)."""
    image_path, side = resolve_map_argument(arg)
    pixels = _read_pixels(image_path)
    if isinstance(side, PackedSidecar):
        entries = [_entry(image_path, f"{image_path.name} ({name})", pixels[..., CHANNEL_INDEX[name]][..., None],
                          channel.measure.name, channel.units, channel.encoding)
                   for name, channel in side.channels.items() if CHANNEL_INDEX[name] < pixels.shape[2]]
        if not entries:
            raise ThickbakeError("the packed image's sidecar describes no channel it holds", path=side.path,
                                 fix="give the image written by --pack-into with its sidecar")
        return entries
    if pixels.shape[2] == 4:
        pixels = pixels[..., :3]
    elif pixels.shape[2] == 2:
        pixels = pixels[..., :1]
    return [_entry(image_path, image_path.name, pixels, side.measure.name, side.units, side.encoding,
                   side.medium, side.map_of)]


def _entry(image_path: Path, label: str, pixels: np.ndarray, measure: str, units: str | None, encoding: Encoding,
           medium: MediumRecord | None = None, map_of: MapOf | None = None) -> MapEntry:
    """The entry of a map (or a packed image's channel) as its sidecar describes it; ``map_of`` None is the
    whole asset on UV set 0."""
    code_max = _checked_code_max(image_path, pixels, encoding)
    channels = pixels.shape[2]
    kind = "transmission" if measure in TRANSMISSION_MEASURES else "thickness"
    sigma = None
    if medium and channels == 3:
        kind = "transmission"  # a medium bake stores RGB transmittance exp(-sigma_tr * d) per channel
    elif kind == "thickness" and medium:
        # grey thickness with the medium recorded: the shader applies exp(-sigma_tr * mm_per_unit * d)
        sigma = medium.sigma_per_unit
    of = map_of or MapOf(None, 0, None)
    if of.material is not None or of.tile is not None or of.uv_set:
        parts = [f"material {of.material}" if of.material is not None else None,
                 f"UV {of.uv_set}" if of.uv_set else None, f"tile {of.tile}" if of.tile is not None else None]
        label += " — " + ", ".join(p for p in parts if p)
    entry = MapEntry(label=label, path=image_path, stored=pixels, code_max=code_max,
                     offset=[encoding.offset] * channels, scale=[encoding.scale] * channels, kind=kind,
                     measure=measure, sigma_per_unit=sigma, uv_set=of.uv_set, material=of.material, tile=of.tile,
                     show_range=(0.0, 1.0), units=units or ("scene units" if kind == "thickness" else "unitless"),
                     map_of_given=map_of is not None)
    entry.show_range = _show_range(entry)
    return entry


def _checked_code_max(image_path: Path, pixels: np.ndarray, encoding: Encoding) -> float:
    """The stored value that means 1 (1 for a float image), after checking the image matches the encoding."""
    if encoding.code_max is None:
        if pixels.dtype.kind != "f":
            raise ThickbakeError(f"the sidecar describes a float map but the image holds {pixels.dtype} codes",
                                 path=image_path, fix="keep each map with the sidecar written beside it")
        return 1.0
    code_max = float(encoding.code_max)
    if pixels.dtype.kind == "f":
        raise ThickbakeError("the sidecar describes integer codes but the image holds floats", path=image_path,
                             fix="keep each map with the sidecar written beside it")
    if code_max < float(pixels.max(initial=0)):
        raise ThickbakeError(f"the image holds codes above the sidecar's code_max {code_max:g}", path=image_path,
                             fix="keep each map with the sidecar written beside it")
    return code_max


def _show_range(entry: MapEntry) -> tuple[float, float]:
    """Black and white of the map views: 0 and the 99.5th percentile of the non-zero decoded values
    (the contact sheet's stretch), or 0 … 1 for a transmission."""
    if entry.kind == "transmission":
        return (0.0, 1.0)
    values = entry.decoded()
    values = values[np.isfinite(values) & (values > 0)]
    top = float(np.percentile(values, 99.5)) if values.size else 1.0
    return (0.0, top if top > 0 else 1.0)


def entry_faces(asset, entry: MapEntry, map_of_given: bool = True) -> np.ndarray:
    """(k,) int64 indices of the asset's faces this entry's map covers.

    The faces are split exactly as the bake split them (:func:`thickbake.pipeline.groups.map_groups`:
    by material and by the UDIM tile of the UV centroid) and the group whose (material, tile) the
    sidecar's ``map_of`` names is taken.  A sidecar without ``map_of`` (a map of the whole asset)
    covers every face with UVs on UV set 0.
    """
    from thickbake.pipeline.groups import map_groups

    if not map_of_given:
        triangle_uv, has_uv = asset.uv_set(0) if hasattr(asset, "uv_set") else (asset.triangle_uv, asset.has_uv)
        return np.flatnonzero(has_uv).astype(np.int64)
    groups, _ = map_groups(asset, entry.uv_set)
    for group in groups:
        key = group.key
        same_material = (key.material is None and entry.material is None) or \
            (entry.material is not None and str(key.material) == str(entry.material))
        if same_material and key.tile == entry.tile:
            return np.flatnonzero(group.faces).astype(np.int64)
    return np.zeros(0, np.int64)


__all__ = ["MapEntry", "entries_of", "entry_faces", "resolve_map_argument", "MAP_SUFFIXES"]
