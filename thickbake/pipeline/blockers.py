"""Which surfaces block a texel's rays: every part (default), its own part only, or a named list.

Separate parts of an asset (teeth in a head, buttons on a coat, the wheels beside a body) shorten the
chords of their neighbours when every part blocks every ray.  A blocker choice is one of

* ``"all"`` — every triangle of the asset blocks (one ray engine);
* ``"own"`` — a texel's rays see only the part it lies on (glTF node/primitive, OBJ object/group);
* ``"NAME,NAME,..."`` — the listed parts or materials block, together with the texel's own part
  (without its own surface every ray would leave the solid at once).

For the last two there is one engine per part over a subset of the trace mesh;
:class:`SubsetEngine` maps the triangle indices it reports back to the asset's.
"""

from __future__ import annotations

import numpy as np

from thickbake.errors import ThickbakeError
from thickbake.settings import parse_blockers


class SubsetEngine:
    """A ray engine over some of the asset's triangles that reports asset triangle indices.

    Parameters
    ----------
    vertices : (m, 3) float64
        The asset's trace vertices.
    faces : (f, 3) int64
        The asset's trace faces.
    keep : (k,) int64
        Indices of the triangles this engine holds.
    make : callable(vertices, faces) -> engine
    """

    def __init__(self, vertices: np.ndarray, faces: np.ndarray, keep: np.ndarray, make):
        self.keep = np.asarray(keep, dtype=np.int64)
        self._engine = make(vertices, faces[self.keep])
        self.name = getattr(self._engine, "name", type(self._engine).__name__)

    @property
    def rays_retraced(self) -> int:
        """Rays the wrapped engine re-traced in a robust scene (its leak guard), 0 if it has none."""
        return getattr(self._engine, "rays_retraced", 0)

    def first_hit(self, origins, directions, max_distance):
        return self._engine.first_hit(origins, directions, max_distance)

    def first_hit_faces(self, origins, directions, max_distance):
        distance, hit, face = self._engine.first_hit_faces(origins, directions, max_distance)
        return distance, hit, np.where(hit, self.keep[np.maximum(face, 0)], -1)


def blocker_faces(asset, choice: str) -> np.ndarray | None:
    """(f,) bool triangles named by a blocker list (None for ``"all"``/``"own"``).

    Raises
    ------
    ThickbakeError
        A name that is neither a part nor a material of the asset.
    """
    if choice in ("all", "own"):
        return None
    n = len(asset.triangles)
    face_part = asset.face_part if asset.face_part is not None else np.zeros(n, np.int64)
    face_material = asset.face_material if asset.face_material is not None else np.zeros(n, np.int64)
    aliases = asset.part_aliases or [(asset.name,)]
    mats = asset.materials or []
    chosen = np.zeros(n, bool)
    for name in choice.split(","):
        parts = [i for i, names in enumerate(aliases) if name in names]
        materials = [i for i, m in enumerate(mats) if m.name == name or (m.name is None and str(m.index) == name)]
        if not parts and not materials:
            known = sorted({a for names in aliases for a in names[:1]} | {m.name for m in mats if m.name})
            raise ThickbakeError(f"blocker {name!r} is neither a part nor a material of the asset",
                                 path=asset.path or asset.name,
                                 fix=f"use 'all', 'own' or names from: {', '.join(known[:12])}"
                                     + (" ..." if len(known) > 12 else ""))
        chosen |= np.isin(face_part, parts) | np.isin(face_material, materials)
    return chosen


def build_engines(asset, choice: str, make, engine=None):
    """Ray engines for a blocker choice and which engine each triangle's texels use.

    Parameters
    ----------
    asset : Asset
    choice : str
        As returned by :func:`parse_blockers`.
    make : callable(vertices, faces) -> engine
    engine : optional
        A ready engine over the whole trace mesh (used for ``"all"``).

    Returns
    -------
    engines : list
    engine_of_face : (f,) int64
        Index into ``engines`` for each triangle.
    """
    n = len(asset.trace_faces)
    if choice == "all":
        whole = engine if engine is not None else make(asset.trace_vertices, asset.trace_faces)
        return [whole], np.zeros(n, np.int64)
    listed = blocker_faces(asset, choice)
    face_part = asset.face_part if asset.face_part is not None else np.zeros(n, np.int64)
    engines = []
    engine_of_face = np.zeros(n, np.int64)
    for p in np.unique(face_part):
        own = face_part == p
        keep = np.flatnonzero(own if listed is None else own | listed)
        engine_of_face[own] = len(engines)
        engines.append(SubsetEngine(asset.trace_vertices, asset.trace_faces, keep, make))
    return engines, engine_of_face


__all__ = ["SubsetEngine", "parse_blockers", "blocker_faces", "build_engines"]
