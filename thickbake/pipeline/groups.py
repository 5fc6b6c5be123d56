"""Which faces go to which map: one map per (material, UV set, UDIM tile).

An asset whose faces share one material and whose UVs stay in the 0–1 square bakes into one map.
Otherwise every material gets its own map (several materials usually lay out their own UVs over the
same square, so one map would average unrelated surfaces), and a UV layout that reaches beyond the
0–1 square is cut into UDIM tiles: tile = 1001 + ⌊u⌋ + 10·⌊v⌋ (MaterialX Specification v1.39,
"Filename Substitutions"), ten tiles per row, u in [0, 10), v ≥ 0.  A face goes to the tile of its
UV centroid, and its UVs are shifted into that tile's unit square.

The same module answers the glTF units question per map: KHR_materials_volume's ``thicknessFactor``
is in the *mesh's* coordinate space, so a map baked in world units needs its node's scale divided
out — possible only when every face of the map sits under one uniform scale.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from thickbake.constants import UNIFORM_SCALE_TOLERANCE
from thickbake.errors import ThickbakeError
from thickbake.geometry import unique_rows

#: UDIM tiles per row of the layout, and the number of the tile at (0, 0) (MaterialX v1.39).
UDIM_COLUMNS = 10
UDIM_FIRST = 1001


@dataclass(frozen=True)
class MapKey:
    """Which part of an asset a map holds.

    Attributes
    ----------
    material : str, int or None
        The material's name; its index in the file when unnamed; None for faces without a material.
    uv_set : int
        UV channel (glTF ``TEXCOORD_n``).
    tile : int or None
        UDIM tile number (1001 …), None when the whole layout stays in the 0–1 square.
    material_index : int or None
        Index of the material in the file (glTF ``materials[i]``; OBJ order of first ``usemtl``).
    """

    material: str | int | None
    uv_set: int
    tile: int | None
    material_index: int | None = None

    def to_dict(self) -> dict:
        """The sidecar's ``map_of`` block."""
        return {"material": self.material, "uv_set": self.uv_set, "tile": self.tile}

    @property
    def material_label(self) -> str:
        """Material as text for file names and messages (``"nomaterial"`` when the faces have none)."""
        return "nomaterial" if self.material is None else str(self.material)


@dataclass
class MapGroup:
    """The faces of one map and their UVs reduced to the map's unit square.

    Attributes
    ----------
    key : MapKey
    faces : (f,) bool
        Faces of the asset baked into this map.
    triangle_uv : (f, 3, 2) float64
        Corner UVs, shifted into [0, 1]² for a UDIM tile (0 for faces not in the map).
    """

    key: MapKey
    faces: np.ndarray
    triangle_uv: np.ndarray


def udim_tile(u_floor: np.ndarray, v_floor: np.ndarray) -> np.ndarray:
    """(n,) UDIM tile numbers of integer tile coordinates: 1001 + ⌊u⌋ + 10·⌊v⌋ (MaterialX v1.39)."""
    return UDIM_FIRST + u_floor + UDIM_COLUMNS * v_floor


def map_groups(asset, uv_set: int = 0) -> tuple[list[MapGroup], list[str]]:
    """Split an asset's faces into maps by material and UDIM tile of UV set ``uv_set``.

    Returns
    -------
    groups : list of MapGroup
        Sorted by material index (faces without material last), then tile.
    warnings : list of str
        Faces left out (UVs outside the UDIM range).
    """
    triangle_uv, has_uv = asset.uv_set(uv_set)
    centroid = triangle_uv.mean(axis=1)
    cell = np.floor(centroid).astype(np.int64)
    cell[~has_uv] = 0
    tiled = bool(((cell != 0) & has_uv[:, None]).any())
    warnings: list[str] = []
    usable = has_uv.copy()
    if tiled:
        outside = has_uv & ((cell[:, 0] < 0) | (cell[:, 0] >= UDIM_COLUMNS) | (cell[:, 1] < 0))
        if outside.any():
            warnings.append(f"{int(outside.sum())} faces have UVs outside the UDIM range (u from 0 to 10, v from 0 "
                            "up) and get no texels — move their islands into a tile")
            usable &= ~outside
    tile = udim_tile(cell[:, 0], cell[:, 1])
    material = asset.face_material if asset.face_material is not None else np.zeros(len(has_uv), np.int64)
    materials = asset.materials or []
    groups = []
    pairs = unique_rows(np.stack([material[usable], tile[usable]], axis=1))
    order = sorted(((int(m), int(t)) for m, t in pairs), key=lambda mt: (_material_order(materials, mt[0]), mt[1]))
    for m, t in order:
        faces = usable & (material == m) & (tile == t)
        uv = triangle_uv - cell[:, None, :] if tiled else triangle_uv
        uv = np.where(faces[:, None, None], uv, 0.0)
        mat = materials[m] if m < len(materials) else None
        key = MapKey(material=mat.key if mat is not None else None, uv_set=int(uv_set), tile=t if tiled else None,
                     material_index=mat.index if mat is not None else None)
        groups.append(MapGroup(key=key, faces=faces, triangle_uv=uv))
    if not groups:
        raise ThickbakeError(f"no face has usable UVs in UV set {uv_set}", path=asset.path or asset.name,
                             fix="check the UV layout (UDIM tiles need u from 0 to 10 and v from 0 up)")
    return groups, warnings


def _material_order(materials, m: int):
    index = materials[m].index if m < len(materials) else None
    return (index is None, index if index is not None else 0, m)


def local_units(face_scale: np.ndarray | None, faces: np.ndarray) -> dict:
    """Node scales of a map's faces and the factor that turns world lengths into the mesh's own units.

    Returns
    -------
    dict
        ``node_scales`` (sorted distinct uniform scales, 6 significant digits), ``uneven`` (faces
        under a non-uniform scale), ``world_per_local`` (the common scale, or None with ``why``).
    """
    if face_scale is None:
        return {"node_scales": [1.0], "uneven_faces": 0, "world_per_local": 1.0, "why": None}
    scale = face_scale[faces]
    uneven = ~np.isfinite(scale)
    found = np.unique(np.round(scale[~uneven], 6)) if (~uneven).any() else np.zeros(0)
    out = {"node_scales": [float(f"{x:.6g}") for x in found[:16]], "uneven_faces": int(uneven.sum()),
           "world_per_local": None, "why": None}
    if uneven.any():
        out["why"] = (f"{int(uneven.sum())} faces sit under a node that scales unevenly, so no single factor turns "
                      "world thickness into the mesh's units")
    elif len(found) > 1 and found.max() / found.min() - 1 > UNIFORM_SCALE_TOLERANCE:
        out["why"] = (f"the faces of this map sit under nodes of different scales ({', '.join(f'{x:g}' for x in found[:6])}); "
                      "glTF thickness is in each mesh's own units, so no single factor fits — bake such instances "
                      "separately or apply their scales")
    else:
        out["world_per_local"] = float(np.median(scale))
    return out


__all__ = ["MapKey", "MapGroup", "map_groups", "udim_tile", "local_units", "UDIM_FIRST", "UDIM_COLUMNS"]
