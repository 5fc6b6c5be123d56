"""Load stage: read a UV-mapped mesh, flatten it into one world-space asset, build the mesh to trace.

A file (OBJ, glTF/GLB, PLY — anything trimesh reads that carries UVs) or an in-memory
``trimesh.Trimesh``/``trimesh.Scene`` becomes an :class:`Asset`: per-triangle corner arrays for the
rasteriser (world positions, UVs, outward shading normals) and a second, *position-merged* copy of the
same triangles for the ray engine.  Exporters split vertices along UV seams and hard edges; merging
them by position makes a closed solid closed again, so inward rays cannot slip out through a seam.

Conventions
-----------
* Positions are world space in scene units, every scene node's transform applied, then *re-centred*
  on the bounding-box centre (``Asset.centre``, float64) before anything is cast to float32 for the
  ray engine: float32 keeps ~7 significant digits, so an asset 10⁶ times its own size from the world
  origin would otherwise lose its shape to rounding.  Thickness does not depend on where the solid
  is, so nothing downstream needs the shift back; a node whose
  transform has a negative determinant mirrors its triangles, so their winding is reversed to keep
  them outward-facing (glTF 2.0 §3.7.4, "the determinant of the node's global transform defines the
  winding order").
* UVs follow the OBJ convention (v up); glTF's V is flipped on load, so glTF and OBJ files of the
  same asset give the same UVs here.  Every UV set is kept (``Asset.uv_sets``); the fields
  ``triangle_uv``/``has_uv`` are set 0.
* Each face knows its material (``face_material``), the part it belongs to (``face_part``: glTF
  node/primitive, OBJ object/group, scene geometry) and the uniform scale of its node
  (``face_scale``, NaN when uneven), for per-material maps, ray blockers and glTF units.
* The face winding defines outside.  A mesh whose volume is negative (inside-out) is flipped as a
  whole, and reported; shading normals are later oriented to agree with the face they lie on.
"""

from __future__ import annotations

import hashlib
import math
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from thickbake.constants import (DEGENERATE_AREA_FRACTION, DEGENERATE_NORMAL_LENGTH, FLOAT32_EXTENT_RANGE,
                                 MERGE_TOLERANCE_FRACTION, MIN_EXTENT_ULPS)
from thickbake.errors import ThickbakeError
from thickbake.inputs import check_regular_file, iter_regular_file, read_regular_file
from thickbake.pipeline.validate import check_glb, check_gltf, check_gltf_document, check_obj, check_ply, confined_resolver
from thickbake.pipeline.readers import Material, Part, ReadResult, apply_transform, read_gltf, read_obj, transform_scale
from thickbake.geometry import (double_areas, expand_ranges, triangle_cross, triangle_edges, unique_rows, unit_normals,
                                uv_areas)

MESH_SUFFIXES = (".obj", ".glb", ".gltf", ".ply", ".off", ".stl")
#: Corners whose faces meet at more than this angle keep separate normals when the file carries none.
#: 45° keeps a box's or a cylinder's edges hard and smooths any sphere with 8+ segments; common
#: practice, no published source.
CREASE_ANGLE_DEG = 45.0


@dataclass
class MeshReport:
    """What the load stage found out about the mesh (all plain numbers, JSON-able)."""

    faces: int
    vertices_in_file: int
    vertices_merged: int
    watertight: bool
    winding_consistent: bool
    boundary_edges: int
    non_manifold_edges: int
    boundary_length: float
    volume: float
    area: float
    orientation_flipped: bool
    normals_from_file: bool
    faces_without_uv: int
    uv_outside_unit_square: float
    degenerate_faces: int = 0
    uv_sets: int = 1
    materials: int = 1
    parts: int = 1
    warnings: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass
class Asset:
    """One UV-mapped asset, flattened to world space.

    Attributes
    ----------
    triangles : (f, 3, 3) float64
        World positions of each triangle's corners, scene units.
    triangle_uv : (f, 3, 2) float64
        UV of each corner (v up).
    triangle_normals : (f, 3, 3) float64
        Unit outward shading normal of each corner.
    face_normals : (f, 3) float64
        Unit outward geometric normal of each triangle (zero for degenerate ones).
    has_uv : (f,) bool
        Triangles that carry UVs; the others still block rays but get no texels.
    trace_vertices : (m, 3) float64
        Position-merged vertices for the ray engine.
    trace_faces : (f, 3) int64
        Triangles over ``trace_vertices``; row i is the same triangle as ``triangles[i]``.
    centre : (3,) float64
        World position of the bounding-box centre that every position above is relative to.
    uv_sets : list of (f, 3, 2) float64
        Corner UVs of each UV set, NaN for faces without UVs in that set.
    face_material : (f,) int64
        Index into ``materials`` (:class:`thickbake.pipeline.readers.Material`).
    face_part : (f,) int64
        Index into ``parts`` (part names) and ``part_aliases`` (names a blocker list may use).
    face_scale : (f,) float64
        Uniform local-to-world scale of the node each face belongs to (NaN: uneven scale).
    face_mesh : (f,) int64
        Which mesh each face instances (two nodes showing one glTF mesh share a value).
    face_degenerate : (f,) bool
        Zero-area triangles (left out of every topology check; they never block a ray).
    """

    triangles: np.ndarray
    triangle_uv: np.ndarray
    triangle_normals: np.ndarray
    face_normals: np.ndarray
    has_uv: np.ndarray
    trace_vertices: np.ndarray
    trace_faces: np.ndarray
    report: MeshReport
    name: str = "mesh"
    path: str | None = None
    sha256: str | None = None
    centre: np.ndarray = field(default_factory=lambda: np.zeros(3))
    uv_sets: list = field(default_factory=list)
    face_material: np.ndarray | None = None
    materials: list = field(default_factory=list)
    face_part: np.ndarray | None = None
    parts: list = field(default_factory=list)
    part_aliases: list = field(default_factory=list)
    face_scale: np.ndarray | None = None
    face_mesh: np.ndarray | None = None
    face_degenerate: np.ndarray | None = None

    @property
    def bounds(self) -> np.ndarray:
        """(2, 3) float64 axis-aligned bounding box of the traced mesh."""
        return np.stack([self.trace_vertices.min(axis=0), self.trace_vertices.max(axis=0)])

    @property
    def diagonal(self) -> float:
        """Length of the bounding-box diagonal, scene units."""
        lo, hi = self.bounds
        return float(np.linalg.norm(hi - lo))

    def uv_set(self, index: int) -> tuple[np.ndarray, np.ndarray]:
        """(f, 3, 2) corner UVs of UV set ``index`` (0 where a face has none) and the (f,) bool faces that have them."""
        sets = self.uv_sets or [np.where(self.has_uv[:, None, None], self.triangle_uv, np.nan)]
        if not (0 <= index < len(sets)) or not np.isfinite(sets[index]).any():
            have = [i for i, uv in enumerate(sets) if np.isfinite(uv).any()]
            raise ThickbakeError(f"the mesh has no UV set {index} (it has {', '.join(map(str, have))})",
                                 path=self.path or self.name, fix=f"choose one of those with --uv-set")
        uv = sets[index]
        has = np.isfinite(uv).all(axis=(1, 2))
        return np.where(has[:, None, None], uv, 0.0), has


def file_sha256(path: str | os.PathLike) -> str:
    """Hex sha256 of a regular file's bytes (streamed; FIFOs, devices and folders are refused).

    Raises
    ------
    ThickbakeError
        The path is not a regular file, is over :data:`thickbake.inputs.MAX_FILE_BYTES`, or cannot
        be read.
    """
    digest = hashlib.sha256()
    for block in iter_regular_file(path, "file"):
        digest.update(block)
    return digest.hexdigest()


def load_asset(source, name: str | None = None, *, need_uv: bool = True, argument: str = "source") -> Asset:
    """Load a mesh file or a trimesh object into an :class:`Asset`.

    Parameters
    ----------
    source : str, os.PathLike, trimesh.Trimesh or trimesh.Scene
        A mesh file (OBJ, glTF/GLB, PLY, ...) or an in-memory mesh/scene with UVs.  glTF and OBJ
        files are read by :mod:`thickbake.pipeline.readers` (every UV set, materials, parts); other
        formats and in-memory objects through trimesh (UV set 0, one material per geometry).
    name : str, optional
        Name used in messages; defaults to the file name.
    need_uv : bool
        False for a solid that is only traced (the source of a bake from a source solid, or a cage,
        :mod:`thickbake.pipeline.transfer`): its UVs are then neither required nor checked.
    argument : str
        What the caller calls ``source``, for the TypeError.

    Raises
    ------
    TypeError
        ``source`` is none of the accepted types.
    ThickbakeError
        Missing, unreadable, non-regular or oversized file (:mod:`thickbake.inputs`), structural
        defects found by :mod:`thickbake.pipeline.validate`, no faces, non-finite vertices, no
        surface, no UVs or UVs of zero area, coordinates float32 cannot resolve.
    """
    import trimesh

    path = None
    digest = None
    if isinstance(source, (str, os.PathLike)) and isinstance(os.fspath(source), str):
        path = os.fspath(source)
        check_regular_file(path)  # never opens: a FIFO or device cannot hang the load
        suffix = Path(path).suffix.lower()
        if suffix not in MESH_SUFFIXES:
            raise ThickbakeError(
                f"unsupported file type {suffix or '(none)'!r}", path=path,
                fix=f"export the mesh as one of {', '.join(MESH_SUFFIXES)}",
            )
        data = read_regular_file(path)  # one read, at most MAX_FILE_BYTES: hashed and parsed from memory
        digest = hashlib.sha256(data).hexdigest()
        with np.errstate(all="ignore"):
            read = _read_bytes(data, suffix, path)
        name = name or Path(path).name
    elif isinstance(source, (trimesh.Trimesh, trimesh.Scene)):
        read = _flatten(source, name or "mesh")
        name = name or "mesh"
    else:
        raise TypeError(f"{argument} must be a file path (str or os.PathLike), a trimesh.Trimesh or a "
                        f"trimesh.Scene, not {type(source).__name__}")
    parts = [p for p in read.parts if len(p.triangles)]
    if not parts:
        raise ThickbakeError("the mesh is empty (no triangles)", path=path or name,
                             fix="export the asset with its geometry")
    with np.errstate(all="ignore"):
        return _assemble(parts, read.materials, name=name, path=path, sha256=digest, need_uv=need_uv)


def _read_bytes(data: bytes, suffix: str, path: str) -> ReadResult:
    """Pre-scan a file's bytes for what the readers leave unchecked (:mod:`thickbake.pipeline.validate`),
    then read them.  External files (glTF buffers and images, OBJ materials) may only come from the
    file's own folder: nothing outside it is opened and no same-named substitute is picked up."""
    folder = Path(path).parent
    if suffix in (".gltf", ".glb"):
        if suffix == ".glb":
            document, bin_length = check_glb(data, path)
            check_gltf_document(document, path, folder=folder, bin_length=bin_length)
        else:
            check_gltf(data, path)
        return read_gltf(path, data=data)
    if suffix == ".obj":
        return read_obj(path, data=check_obj(data, path))
    if suffix == ".ply":
        check_ply(data, path)
    return _read_with_trimesh(data, suffix, path)


# ---------------------------------------------------------------------------- flattening
def _read_with_trimesh(data: bytes, suffix: str, path: str) -> ReadResult:
    import io
    import logging
    import warnings

    import trimesh

    resolver = confined_resolver(Path(path).parent, path)
    try:
        # (maintain_order=True would keep vertex order but drops an OBJ's UVs when the file
        # has an unused vertex, with trimesh 5.2; the bake does not need the file's order)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            logging.getLogger("trimesh").setLevel(logging.CRITICAL)
            loaded = trimesh.load(io.BytesIO(data), file_type=suffix[1:], resolver=resolver, process=False)
    except ThickbakeError:
        raise
    except MemoryError:
        raise ThickbakeError("not enough memory to load the file", path=path,
                             fix="decimate the mesh, or bake on a machine with more memory") from None
    except Exception as exc:  # trimesh raises many types for broken files
        detail = " ".join(str(exc).split())[:160]
        detail = f"{type(exc).__name__}: {detail}" if detail else type(exc).__name__
        raise ThickbakeError(f"cannot read the file ({detail})", path=path,
                             fix="re-export it from your modelling tool") from None
    return _flatten(loaded, path)


def _flatten(loaded, where: str) -> ReadResult:
    """Parts of an in-memory trimesh object (one per scene geometry instance), world space."""
    import trimesh

    materials: list[Material] = []
    by_name: dict = {}
    parts: list[Part] = []

    def material_of(geom) -> int:
        mat = getattr(geom.visual, "material", None)
        label = getattr(mat, "name", None) or None
        key = label if label is not None else id(mat) if mat is not None else None
        if key not in by_name:
            by_name[key] = len(materials)
            materials.append(Material(label, len(materials) if mat is not None else None))
        return by_name[key]

    if isinstance(loaded, trimesh.Trimesh):
        parts.append(_part(loaded, np.eye(4), where, "mesh", material_of(loaded)))
    elif isinstance(loaded, trimesh.Scene):
        for node in loaded.graph.nodes_geometry:
            transform, geom_name = loaded.graph[node]
            geom = loaded.geometry.get(geom_name)
            if isinstance(geom, trimesh.Trimesh):
                part = _part(geom, np.asarray(transform, dtype=np.float64), where, str(node), material_of(geom))
                part.aliases = (str(node), str(geom_name))
                part.mesh = str(geom_name)
                parts.append(part)
    else:
        raise ThickbakeError("the file holds no triangle mesh", path=where,
                             fix="export the asset as a triangle mesh (not points or lines)")
    return ReadResult(parts=parts, materials=materials or [Material(None, None)])


def _part(geom, transform: np.ndarray, where: str, name: str, material: int) -> Part:
    vertices = np.asarray(geom.vertices, dtype=np.float64)
    faces = np.asarray(geom.faces, dtype=np.int64)
    if faces.ndim != 2 or faces.shape[1] != 3:
        faces = np.zeros((0, 3), dtype=np.int64)
    if len(faces) and (faces.min() < 0 or faces.max() >= len(vertices)):
        raise ThickbakeError(f"a triangle refers to vertex {int(faces.max())} of {len(vertices)} (corrupt index data)",
                             path=where, fix="re-export the mesh from your modelling tool")
    uv = getattr(geom.visual, "uv", None)
    corner_uv = np.full((len(faces), 3, 2), np.nan)
    if uv is not None:
        uv = np.asarray(uv, dtype=np.float64)
        if uv.shape == (len(vertices), 2):
            corner_uv = uv[faces]
    normals = _file_normals(geom, vertices, faces)
    if normals is not None:
        normals = normals[faces]
    tri, normals, order = apply_transform(vertices[faces], normals, transform)
    return Part(name=name, aliases=(name,), triangles=tri[:, order], uv_sets=[corner_uv[:, order]],
                normals=None if normals is None else normals[:, order], material=material,
                scale=transform_scale(transform[:3, :3]), mesh=name, vertices=len(vertices))


def _file_normals(geom, vertices: np.ndarray, faces: np.ndarray) -> np.ndarray | None:
    """(m, 3) float64 vertex normals the file (or the in-memory mesh) carries, or None.

    trimesh keeps normals read from a file as its ``vertex_normals`` and otherwise computes them on
    access, with no public flag telling the two apart.  Computing them is deterministic
    (``trimesh.geometry.weighted_vertex_normals`` over the public face normals and angles), so normals
    bit for bit equal to that computation were not given: the bake then builds its own corner normals
    with creases (:func:`corner_normals`), which trimesh's smooth average would round over.
    """
    import trimesh

    if len(faces) == 0:
        return None
    normals = np.asarray(geom.vertex_normals, dtype=np.float64)
    if normals.shape != vertices.shape:
        return None
    computed = trimesh.geometry.weighted_vertex_normals(vertex_count=len(geom.vertices), faces=geom.faces,
                                                        face_normals=geom.face_normals,
                                                        face_angles=geom.face_angles)
    if np.array_equal(normals, np.asarray(computed, dtype=np.float64), equal_nan=True):
        return None
    return normals


# ---------------------------------------------------------------------------- assembly
def _assemble(parts: list[Part], materials: list[Material], name: str, path: str | None, sha256: str | None,
              need_uv: bool = True) -> Asset:
    """Flatten the parts into one checked, re-centred, welded and outward-wound :class:`Asset`.

    The steps, each its own function below: stack the parts' per-face arrays (:func:`_stack_parts`),
    check the UV sets (:func:`_checked_uvs`), re-centre on the bounding box (:func:`_recentred`),
    weld by position for the ray engine (:func:`_welded`), find zero-area faces
    (:func:`_degenerate_faces`), reverse an inside-out mesh (:meth:`_Corners.reversed`), count open
    and shared edges (:func:`_topology`), word the warnings (:func:`_load_warnings`) and complete the
    shading normals (:func:`_shading_normals`).

    Raises
    ------
    ThickbakeError
        Non-finite vertices or UVs, no UVs (when ``need_uv``), a UV layout of zero area, coordinates
        float32 cannot resolve, or no triangle with an area.
    """
    where = path or name
    faces = _stack_parts(parts)
    if not np.isfinite(faces.triangles).all():
        raise ThickbakeError("the mesh has vertices that are NaN or infinite", path=where,
                             fix="clean the mesh (delete loose or broken vertices) and export again")
    uv = _checked_uvs(faces.uv_sets, len(faces.triangles), need_uv, where)
    triangles, centre, lo, diagonal = _recentred(faces.triangles, where)
    trace_vertices, trace_faces = _welded(triangles, lo, diagonal)
    cross = triangle_cross(triangles)
    double_area = double_areas(triangles, cross)
    degenerate = _degenerate_faces(trace_faces, double_area, diagonal, where)
    corners = _Corners(triangles, uv.triangle_uv, faces.normals, uv.sets, cross)

    volume = signed_volume(trace_vertices, trace_faces[~degenerate])
    flipped = volume < 0
    if flipped:
        trace_faces = trace_faces[:, ::-1].copy()
        corners = corners.reversed()
        volume = -volume
    topology = _topology(trace_vertices, trace_faces[~degenerate])
    warnings = _load_warnings(flipped, topology, int(degenerate.sum()), ~np.logical_or.reduce(uv.finite), parts,
                              faces.part)
    face_normals = unit_normals(corners.triangles, corners.cross, double_area)
    triangle_normals = _shading_normals(corners.normals, faces.file_normals, trace_faces, face_normals, double_area)

    report = MeshReport(
        faces=int(len(triangles)), vertices_in_file=faces.vertices_in_file, vertices_merged=int(len(trace_vertices)),
        watertight=topology.watertight, winding_consistent=topology.winding_consistent,
        boundary_edges=topology.boundary_edges, non_manifold_edges=topology.non_manifold_edges,
        boundary_length=topology.boundary_length, volume=volume, area=float(double_area.sum() / 2),
        orientation_flipped=flipped, normals_from_file=bool(faces.file_normals.all()),
        faces_without_uv=int((~uv.has_uv).sum()), uv_outside_unit_square=uv.outside,
        degenerate_faces=int(degenerate.sum()), uv_sets=len(corners.uv_sets),
        materials=int(len(np.unique(faces.material))), parts=len(parts), warnings=warnings,
    )
    return Asset(
        triangles=corners.triangles, triangle_uv=corners.triangle_uv,
        triangle_normals=triangle_normals, face_normals=face_normals, has_uv=uv.has_uv,
        trace_vertices=trace_vertices, trace_faces=trace_faces, report=report,
        name=name, path=path, sha256=sha256, centre=centre,
        uv_sets=[np.where(f[:, None, None], s, np.nan) for f, s in zip(uv.finite, corners.uv_sets)],
        face_material=faces.material, materials=list(materials), face_part=faces.part,
        parts=[p.name for p in parts], part_aliases=[tuple(p.aliases) for p in parts],
        face_scale=faces.scale, face_mesh=faces.mesh, face_degenerate=degenerate,
    )


@dataclass
class _StackedParts:
    """The parts' per-face arrays, stacked in part order (f faces in all).

    Attributes
    ----------
    triangles : (f, 3, 3) float64
        World corner positions, scene units.
    uv_sets : list of (f, 3, 2) float64
        Corner UVs of each UV set any part has; NaN where a part lacks that set.
    normals : (f, 3, 3) float64
        The file's corner normals (not normalised); 0 for parts without normals.
    file_normals : (f,) bool
        Faces whose part carries normals.
    part, material, mesh : (f,) int64
        Index of each face's part, material and (sorted) instanced mesh.
    scale : (f,) float64
        Uniform node scale of each face's part (NaN: uneven).
    vertices_in_file : int
        Vertices the parts had in the file (3 per triangle where unknown).
    """

    triangles: np.ndarray
    uv_sets: list
    normals: np.ndarray
    file_normals: np.ndarray
    part: np.ndarray
    material: np.ndarray
    mesh: np.ndarray
    scale: np.ndarray
    vertices_in_file: int


def _stack_parts(parts: list[Part]) -> _StackedParts:
    """Concatenate the parts' triangles, UV sets, normals and per-face labels (see :class:`_StackedParts`)."""
    n_sets = max(len(p.uv_sets) for p in parts)
    meshes = sorted({p.mesh for p in parts})

    def per_face(value_of, dtype=None) -> np.ndarray:
        return np.concatenate([np.full(len(p.triangles), value_of(i, p), dtype) for i, p in enumerate(parts)])

    return _StackedParts(
        triangles=np.concatenate([p.triangles for p in parts]),
        uv_sets=[np.concatenate([p.uv_sets[s] if s < len(p.uv_sets) else np.full((len(p.triangles), 3, 2), np.nan)
                                 for p in parts]) for s in range(n_sets)],
        normals=np.concatenate([p.normals if p.normals is not None else np.zeros((len(p.triangles), 3, 3))
                                for p in parts]),
        file_normals=per_face(lambda i, p: p.normals is not None),
        part=per_face(lambda i, p: i, np.int64),
        material=per_face(lambda i, p: p.material, np.int64),
        mesh=per_face(lambda i, p: meshes.index(p.mesh), np.int64),
        scale=per_face(lambda i, p: p.scale, np.float64),
        vertices_in_file=int(sum(p.vertices or 3 * len(p.triangles) for p in parts)),
    )


@dataclass
class _CheckedUVs:
    """The UV sets after :func:`_checked_uvs` (f faces).

    Attributes
    ----------
    sets : list of (f, 3, 2) float64
        Corner UVs of each set (one all-NaN set for a traced-only solid).
    finite : list of (f,) bool
        Faces whose three corners carry finite UVs, per set.
    has_uv : (f,) bool
        ``finite[0]``: the faces that get texels.
    triangle_uv : (f, 3, 2) float64
        UV set 0, 0 where a face has none.
    outside : float
        Share of set 0's UV area (by triangle centroid) outside [0, 1]².
    """

    sets: list
    finite: list
    has_uv: np.ndarray
    triangle_uv: np.ndarray
    outside: float


def _checked_uvs(uv_sets: list, n_faces: int, need_uv: bool, where: str) -> _CheckedUVs:
    """Check the (f, 3, 2) UV sets: no half-finite faces, some UVs (when ``need_uv``), a non-zero area.

    A UV set counts for a face when all three corners carry finite UVs; a face with some corners NaN
    and others finite is broken data.  A traced-only solid (``need_uv`` False) gets one all-NaN set:
    its UVs, if any, are never read.
    """
    finite = [np.isfinite(uv).all(axis=(1, 2)) for uv in uv_sets]
    partial = [~f & np.isfinite(uv).any(axis=(1, 2)) for f, uv in zip(finite, uv_sets)]
    if not need_uv:
        uv_sets = [np.full((n_faces, 3, 2), np.nan)]
        finite = partial = [np.zeros(n_faces, bool)]
    if any(p.any() for p in partial):
        raise ThickbakeError("the mesh has UV coordinates that are NaN or infinite", path=where,
                             fix="repair the UV layout and export again")
    if need_uv and not any(f.any() for f in finite):
        raise ThickbakeError("the mesh has no UV coordinates", path=where,
                             fix="unwrap it (give it a UV layout) and export with texture coordinates")
    has_uv = finite[0]
    triangle_uv = np.where(has_uv[:, None, None], uv_sets[0], 0.0)
    outside = 0.0
    if has_uv.any():
        uv_area = uv_areas(triangle_uv[has_uv])
        if not (uv_area.sum() > 0):
            raise ThickbakeError("the UV layout has zero area (all UVs collapse to a point or a line)", path=where,
                                 fix="unwrap the mesh so its UV islands cover part of the 0–1 square")
        outside = _uv_outside_fraction(triangle_uv[has_uv], uv_area)
    return _CheckedUVs(uv_sets, finite, has_uv, triangle_uv, outside)


def _recentred(triangles: np.ndarray, where: str) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
    """Shift (f, 3, 3) world corners, scene units, onto their bounding-box centre, in float64.

    Done before anything is cast to float32 (module docstring).  Returns the shifted corners, the
    (3,) centre, the (3,) shifted lower corner of the bounding box and the diagonal (scene units),
    after :func:`_check_representable` has accepted the extent.
    """
    flat = triangles.reshape(-1, 3)
    lo, hi = flat.min(axis=0), flat.max(axis=0)
    centre = (lo + hi) / 2
    diagonal = float(np.linalg.norm(hi - lo))
    _check_representable(lo, hi, diagonal, where)
    return triangles - centre, centre, lo - centre, diagonal


def _welded(triangles: np.ndarray, lo: np.ndarray, diagonal: float) -> tuple[np.ndarray, np.ndarray]:
    """(m, 3) float64 vertices and (f, 3) int64 faces of the (f, 3, 3) corners merged by position.

    Corners on one cell of a grid of :data:`~thickbake.constants.MERGE_TOLERANCE_FRACTION` × the
    diagonal, anchored at the bounding box's lower corner ``lo`` (3,), become one vertex.
    """
    flat = triangles.reshape(-1, 3)
    tol = diagonal * MERGE_TOLERANCE_FRACTION
    keys = np.round((flat - lo) / tol).astype(np.int64)
    _, first, inverse = unique_rows(keys, return_index=True, return_inverse=True)
    return flat[first], inverse.reshape(-1, 3).astype(np.int64)


def _degenerate_faces(faces: np.ndarray, double_area: np.ndarray, diagonal: float, where: str) -> np.ndarray:
    """(f,) bool zero-area triangles: two welded corners, or twice the area (f,), scene units², below
    (:data:`~thickbake.constants.DEGENERATE_AREA_FRACTION` × diagonal)².

    They have no inside or outside, so they are left out of every topology count and cannot pass for
    holes or flipped faces.  Raises ThickbakeError when every triangle is degenerate.
    """
    degenerate = ((faces[:, 0] == faces[:, 1]) | (faces[:, 1] == faces[:, 2]) | (faces[:, 0] == faces[:, 2])
                  | ~(double_area > (DEGENERATE_AREA_FRACTION * diagonal) ** 2))
    if degenerate.all():
        raise ThickbakeError("the mesh has no surface area (every triangle is degenerate: its corners are collinear "
                             "or coincide)", path=where, fix="export the real geometry, not a line or a point cloud")
    return degenerate


@dataclass
class _Corners:
    """The per-corner arrays whose order is the winding (f faces): reversed together when a mesh is inside-out.

    Attributes
    ----------
    triangles : (f, 3, 3) float64
        Re-centred corner positions, scene units.
    triangle_uv : (f, 3, 2) float64
        UV set 0.
    normals : (f, 3, 3) float64
        The file's corner normals.
    uv_sets : list of (f, 3, 2) float64
    cross : (f, 3) float64
        Edge cross product of each triangle (twice its area times its unit normal).
    """

    triangles: np.ndarray
    triangle_uv: np.ndarray
    normals: np.ndarray
    uv_sets: list
    cross: np.ndarray

    def reversed(self) -> "_Corners":
        """The same triangles wound the other way (corner order reversed, normals of the winding negated)."""
        return _Corners(self.triangles[:, ::-1].copy(), self.triangle_uv[:, ::-1].copy(),
                        self.normals[:, ::-1].copy(), [uv[:, ::-1].copy() for uv in self.uv_sets], -self.cross)


@dataclass
class _Topology:
    """Edge counts of the welded, non-degenerate faces (lengths in scene units)."""

    boundary_edges: int
    boundary_length: float
    non_manifold_edges: int
    watertight: bool
    winding_consistent: bool


def _topology(vertices: np.ndarray, faces: np.ndarray) -> _Topology:
    """Open edges (used once), edges shared by more than two faces and winding consistency of (f, 3)
    int64 faces over (m, 3) float64 vertices."""
    unique_edges, edge_counts = unique_rows(triangle_edges(faces), return_counts=True)
    boundary = unique_edges[edge_counts == 1]
    non_manifold = int((edge_counts > 2).sum())
    boundary_length = float(np.linalg.norm(vertices[boundary[:, 0]] - vertices[boundary[:, 1]], axis=1).sum())
    return _Topology(boundary_edges=int(len(boundary)), boundary_length=boundary_length,
                     non_manifold_edges=non_manifold, watertight=bool(len(boundary) == 0 and non_manifold == 0),
                     winding_consistent=_winding_consistent(faces))


def _load_warnings(flipped: bool, topology: _Topology, n_degenerate: int, no_uv: np.ndarray, parts: list[Part],
                   face_part: np.ndarray) -> list[str]:
    """The load's warnings, in the order they are printed; ``no_uv`` (f,) bool marks faces without
    UVs in any set and ``face_part`` (f,) int64 their parts."""
    warnings: list[str] = []
    if flipped:
        warnings.append("the mesh was inside-out (negative volume); its winding was reversed for the bake")
    if topology.boundary_edges:
        warnings.append(f"the mesh is not closed ({topology.boundary_edges} open edges after merging seams); "
                        "rays escaping through holes count as the full reach — run 'thickbake verify' on it")
    if topology.non_manifold_edges:
        warnings.append(f"{topology.non_manifold_edges} edges are shared by more than two faces (internal or "
                        "duplicated faces) — run 'thickbake verify' on the mesh")
    if not topology.winding_consistent:
        warnings.append("some faces are wound opposite to their neighbours; their normals point inward — "
                        "run 'thickbake verify' on the mesh")
    if n_degenerate:
        warnings.append(f"{n_degenerate} degenerate (zero-area) triangles: they get no texels and block no rays — "
                        "delete them (merge vertices by distance, remove degenerate faces) and export again")
    if no_uv.any():
        names = sorted({parts[i].name for i in np.unique(face_part[no_uv])})
        shown = ", ".join(names[:5]) + (f" and {len(names) - 5} more" if len(names) > 5 else "")
        warnings.append(f"{int(no_uv.sum())} faces have no UV coordinates (in {shown}): they block rays but get no "
                        "texels — unwrap them if they need a map")
    return warnings


def _shading_normals(file_normals: np.ndarray, from_file: np.ndarray, faces: np.ndarray, face_normals: np.ndarray,
                     double_area: np.ndarray) -> np.ndarray:
    """(f, 3, 3) float64 unit shading normal of each corner.

    Faces whose part carries no normals (``from_file`` (f,) bool false) take crease-aware corner
    normals (:func:`corner_normals` over the (f, 3) welded ``faces``, :data:`CREASE_ANGLE_DEG`);
    normals that cancel to (nearly) zero length fall back to the (f, 3) unit face normal.
    """
    normals = file_normals.copy()
    need = ~from_file
    if need.any():
        computed = corner_normals(faces, face_normals, double_area, CREASE_ANGLE_DEG)
        normals[need] = computed[need]
    lengths = np.linalg.norm(normals, axis=2, keepdims=True)
    bad = ~(lengths > DEGENERATE_NORMAL_LENGTH)
    return np.where(bad, face_normals[:, None, :], normals / np.where(bad, 1.0, lengths))


def _check_representable(lo: np.ndarray, hi: np.ndarray, diagonal: float, where: str) -> None:
    """Refuse coordinates the bake cannot trace faithfully (:data:`~thickbake.constants.FLOAT32_EXTENT_RANGE`,
    :data:`~thickbake.constants.MIN_EXTENT_ULPS`)."""
    if not (diagonal > 0):
        raise ThickbakeError("the mesh has no extent (all vertices at one point)", path=where,
                             fix="export the real geometry")
    if not math.isfinite(diagonal) or diagonal > FLOAT32_EXTENT_RANGE[1]:
        raise ThickbakeError(f"the mesh is {diagonal:.3g} scene units across, beyond what float32 ray tracing "
                             "can hold", path=where, fix="export it in larger units (e.g. kilometres instead of millimetres)")
    if diagonal < FLOAT32_EXTENT_RANGE[0]:
        raise ThickbakeError(f"the mesh is only {diagonal:.3g} scene units across, below float32 resolution",
                             path=where, fix="export it in smaller units (e.g. millimetres instead of kilometres)")
    far = float(np.abs(np.concatenate([lo, hi])).max())
    if diagonal < MIN_EXTENT_ULPS * np.spacing(far):
        raise ThickbakeError(f"the mesh is {diagonal:.3g} scene units across but lies {far:.3g} from the origin: its "
                             "coordinates have lost its shape to rounding", path=where,
                             fix="move the asset near the origin in your modelling tool and export again")


def _uv_outside_fraction(uv: np.ndarray, area: np.ndarray) -> float:
    """Share of UV area (by triangle centroid) outside [0, 1]²."""
    centroid = uv.mean(axis=1)
    out = ((centroid < 0) | (centroid > 1)).any(axis=1)
    total = area.sum()
    return float(area[out].sum() / total) if total > 0 else 0.0


def signed_volume(vertices: np.ndarray, faces: np.ndarray) -> float:
    """Signed volume enclosed by triangles, scene units³: Σ v0 · (v1 × v2) / 6 (divergence theorem).

    Positive when the triangles wind counter-clockwise seen from outside; for an open mesh it is the
    volume of the cone from the origin, which is all the orientation test needs.
    """
    tri = vertices[faces]
    return float(np.einsum("ij,ij->", tri[:, 0], np.cross(tri[:, 1], tri[:, 2])) / 6.0)


def _winding_consistent(faces: np.ndarray) -> bool:
    """True when no directed edge is used twice (two neighbours traversing it the same way)."""
    _, counts = unique_rows(triangle_edges(faces, directed=True), return_counts=True)
    return bool((counts == 1).all())


def corner_normals(faces: np.ndarray, face_normals: np.ndarray, double_area: np.ndarray,
                   crease_deg: float) -> np.ndarray:
    """Area-weighted per-corner normals that stay sharp across creases.

    Each corner takes the area-weighted mean of the normals of the faces around its (merged) vertex
    whose normal is within ``crease_deg`` of its own face's normal.

    Parameters
    ----------
    faces : (f, 3) int64
        Triangles over position-merged vertices.
    face_normals : (f, 3) float64
        Unit face normals.
    double_area : (f,) float64
        Twice each face's area (the weight).
    crease_deg : float
        Crease angle in degrees.

    Returns
    -------
    (f, 3, 3) float64
        Unit normal per corner.
    """
    corner_vertex = faces.reshape(-1)
    corner_face = np.repeat(np.arange(len(faces)), 3)
    order = np.argsort(corner_vertex, kind="stable")
    sorted_vertex = corner_vertex[order]
    starts = np.flatnonzero(np.r_[True, sorted_vertex[1:] != sorted_vertex[:-1]])
    sizes = np.diff(np.r_[starts, len(sorted_vertex)])
    group_of_sorted = np.repeat(np.arange(len(starts)), sizes)
    # pair every corner with every face around its vertex: sum(size²) pairs
    reps = sizes[group_of_sorted]
    left = np.repeat(np.arange(len(order)), reps)                 # index into sorted corners
    offset_in_group = expand_ranges(reps)
    right = starts[group_of_sorted[left]] + offset_in_group       # sorted index of the neighbour
    own_face = corner_face[order[left]]
    other_face = corner_face[order[right]]
    cos_limit = np.cos(np.radians(crease_deg))
    keep = np.einsum("ij,ij->i", face_normals[own_face], face_normals[other_face]) >= cos_limit
    weighted = face_normals[other_face[keep]] * double_area[other_face[keep], None]
    sums = np.zeros((len(order), 3))
    np.add.at(sums, left[keep], weighted)
    result = np.empty_like(sums)
    result[order] = sums
    result = result.reshape(-1, 3, 3)
    norm = np.linalg.norm(result, axis=2, keepdims=True)
    return np.where(norm > 0, result / np.where(norm > 0, norm, 1), face_normals[:, None, :])
