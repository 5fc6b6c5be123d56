"""Load stage: read a UV-mapped mesh, flatten it into one world-space asset, build the mesh to trace.

A file (OBJ, glTF/GLB, PLY — anything trimesh reads that carries UVs) or an in-memory
``trimesh.Trimesh``/``trimesh.Scene`` becomes an :class:`Asset`: per-triangle corner arrays for the
rasteriser (world positions, UVs, outward shading normals) and a second, *position-merged* copy of the
same triangles for the ray engine.  Exporters split vertices along UV seams and hard edges; merging
them by position makes a closed solid closed again, so inward rays cannot slip out through a seam.

Conventions
-----------
* Positions are world space in scene units: every scene node's transform is applied.  A node whose
  transform has a negative determinant mirrors its triangles, so their winding is reversed to keep
  them outward-facing (glTF 2.0 §3.7.4, "the determinant of the node's global transform defines the
  winding order").
* UVs follow the OBJ convention (v up).  trimesh flips glTF's V on load, so glTF and OBJ files of the
  same asset give the same UVs here.
* The face winding defines outside.  A mesh whose volume is negative (inside-out) is flipped as a
  whole, and reported; shading normals are later oriented to agree with the face they lie on.
"""

from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from thickbake.errors import ThickbakeError

MESH_SUFFIXES = (".obj", ".glb", ".gltf", ".ply", ".off", ".stl")
#: Vertices closer than this fraction of the bounding-box diagonal are merged for tracing.  Seam
#: duplicates are usually bit-identical; 1e-7 absorbs float round-off of exporters and transforms
#: while staying far below any real feature size.
MERGE_TOLERANCE_FRACTION = 1e-7
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

    @property
    def bounds(self) -> np.ndarray:
        """(2, 3) float64 axis-aligned bounding box of the traced mesh."""
        return np.stack([self.trace_vertices.min(axis=0), self.trace_vertices.max(axis=0)])

    @property
    def diagonal(self) -> float:
        """Length of the bounding-box diagonal, scene units."""
        lo, hi = self.bounds
        return float(np.linalg.norm(hi - lo))


def file_sha256(path: str | os.PathLike) -> str:
    """Hex sha256 of a file's bytes (streamed)."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def load_asset(source, name: str | None = None) -> Asset:
    """Load a mesh file or a trimesh object into an :class:`Asset`.

    Parameters
    ----------
    source : str, os.PathLike, trimesh.Trimesh or trimesh.Scene
        A mesh file (OBJ, glTF/GLB, PLY, ...) or an in-memory mesh/scene with UVs.
    name : str, optional
        Name used in messages; defaults to the file name.

    Raises
    ------
    ThickbakeError
        Missing or unreadable file, no faces, non-finite vertices, no UVs or UVs of zero area.
    """
    import trimesh

    path = None
    digest = None
    if isinstance(source, (str, os.PathLike)):
        path = os.fspath(source)
        if not os.path.exists(path):
            raise ThickbakeError("no such file", path=path, fix="check the path")
        if os.path.isdir(path):
            raise ThickbakeError("is a folder, not a mesh file", path=path, fix="give a mesh file, or use 'thickbake batch' for folders")
        suffix = Path(path).suffix.lower()
        if suffix not in MESH_SUFFIXES:
            raise ThickbakeError(
                f"unsupported file type {suffix or '(none)'!r}", path=path,
                fix=f"export the mesh as one of {', '.join(MESH_SUFFIXES)}",
            )
        digest = file_sha256(path)
        try:
            # (maintain_order=True would keep vertex order but drops an OBJ's UVs when the file
            # has an unused vertex, with trimesh 5.2; the bake does not need the file's order)
            loaded = trimesh.load(path, process=False)
        except Exception as exc:  # trimesh raises many types for broken files
            detail = " ".join(str(exc).split())[:160] or type(exc).__name__
            raise ThickbakeError(f"cannot read the file ({detail})", path=path,
                                 fix="re-export it from your modelling tool") from None
        name = name or Path(path).name
    else:
        loaded = source
        name = name or "mesh"
    parts = _flatten(loaded, path or name)
    return _assemble(parts, name=name, path=path, sha256=digest)


# ---------------------------------------------------------------------------- flattening
def _flatten(loaded, where: str):
    """List of (vertices, faces, uv or None, normals or None) in world space."""
    import trimesh

    parts = []
    if isinstance(loaded, trimesh.Trimesh):
        parts.append(_part(loaded, np.eye(4), where))
    elif isinstance(loaded, trimesh.Scene):
        for node in loaded.graph.nodes_geometry:
            transform, geom_name = loaded.graph[node]
            geom = loaded.geometry.get(geom_name)
            if isinstance(geom, trimesh.Trimesh):
                parts.append(_part(geom, np.asarray(transform, dtype=np.float64), where))
    else:
        raise ThickbakeError("the file holds no triangle mesh", path=where,
                             fix="export the asset as a triangle mesh (not points or lines)")
    parts = [p for p in parts if len(p[1])]
    if not parts:
        raise ThickbakeError("the mesh is empty (no triangles)", path=where,
                             fix="export the asset with its geometry")
    return parts


def _part(geom, transform: np.ndarray, where: str):
    vertices = np.asarray(geom.vertices, dtype=np.float64)
    faces = np.asarray(geom.faces, dtype=np.int64)
    if faces.ndim != 2 or faces.shape[1] != 3:
        faces = np.zeros((0, 3), dtype=np.int64)
    if len(faces) and (faces.min() < 0 or faces.max() >= len(vertices)):
        raise ThickbakeError(f"a triangle refers to vertex {int(faces.max())} of {len(vertices)} (corrupt index data)",
                             path=where, fix="re-export the mesh from your modelling tool")
    uv = getattr(geom.visual, "uv", None)
    if uv is not None:
        uv = np.asarray(uv, dtype=np.float64)
        if uv.shape != (len(vertices), 2):
            uv = None
    normals = None
    if "vertex_normals" in geom._cache:
        normals = np.asarray(geom.vertex_normals, dtype=np.float64)
        if normals.shape != vertices.shape:
            normals = None
    linear = transform[:3, :3]
    world = vertices @ linear.T + transform[:3, 3]
    if normals is not None:
        normals = normals @ np.linalg.inv(linear)  # inverse transpose, applied to row vectors
    if np.linalg.det(linear) < 0:
        faces = faces[:, ::-1]
    return world, faces, uv, normals


# ---------------------------------------------------------------------------- assembly
def _assemble(parts, name: str, path: str | None, sha256: str | None) -> Asset:
    where = path or name
    tri_list, uv_list, nrm_list, has_uv_list, has_nrm_list = [], [], [], [], []
    vertices_in_file = 0
    for world, faces, uv, normals in parts:
        vertices_in_file += len(world)
        tri_list.append(world[faces])
        uv_list.append(uv[faces] if uv is not None else np.full((len(faces), 3, 2), np.nan))
        has_uv_list.append(np.full(len(faces), uv is not None))
        nrm_list.append(normals[faces] if normals is not None else np.zeros((len(faces), 3, 3)))
        has_nrm_list.append(np.full(len(faces), normals is not None))
    triangles = np.concatenate(tri_list)
    triangle_uv = np.concatenate(uv_list)
    triangle_normals = np.concatenate(nrm_list)
    has_uv = np.concatenate(has_uv_list)
    has_file_normals = np.concatenate(has_nrm_list)

    if not np.isfinite(triangles).all():
        raise ThickbakeError("the mesh has vertices that are NaN or infinite", path=where,
                             fix="clean the mesh (delete loose or broken vertices) and export again")
    if not has_uv.any():
        raise ThickbakeError("the mesh has no UV coordinates", path=where,
                             fix="unwrap it (give it a UV layout) and export with texture coordinates")
    uv_ok = has_uv & np.isfinite(triangle_uv).all(axis=(1, 2))
    if not uv_ok[has_uv].all():
        raise ThickbakeError("the mesh has UV coordinates that are NaN or infinite", path=where,
                             fix="repair the UV layout and export again")
    uv_area = _uv_area(triangle_uv[has_uv])
    if not (uv_area.sum() > 0):
        raise ThickbakeError("the UV layout has zero area (all UVs collapse to a point or a line)", path=where,
                             fix="unwrap the mesh so its UV islands cover part of the 0–1 square")
    outside = _uv_outside_fraction(triangle_uv[has_uv], uv_area)

    # position-merged mesh for tracing
    flat = triangles.reshape(-1, 3)
    lo, hi = flat.min(axis=0), flat.max(axis=0)
    diagonal = float(np.linalg.norm(hi - lo))
    if diagonal <= 0:
        raise ThickbakeError("the mesh has no extent (all vertices at one point)", path=where,
                             fix="export the real geometry")
    tol = diagonal * MERGE_TOLERANCE_FRACTION
    keys = np.round((flat - lo) / tol).astype(np.int64)
    _, first, inverse = np.unique(keys, axis=0, return_index=True, return_inverse=True)
    trace_vertices = flat[first]
    trace_faces = inverse.reshape(-1, 3).astype(np.int64)

    volume = signed_volume(trace_vertices, trace_faces)
    flipped = False
    warnings: list[str] = []
    if volume < 0:
        flipped = True
        trace_faces = trace_faces[:, ::-1].copy()
        triangles = triangles[:, ::-1].copy()
        triangle_uv = triangle_uv[:, ::-1].copy()
        triangle_normals = triangle_normals[:, ::-1].copy()
        volume = -volume
        warnings.append("the mesh was inside-out (negative volume); its winding was reversed for the bake")

    edges = np.sort(trace_faces[:, [0, 1, 1, 2, 2, 0]].reshape(-1, 2), axis=1)
    unique_edges, edge_counts = np.unique(edges, axis=0, return_counts=True)
    boundary = unique_edges[edge_counts == 1]
    non_manifold = int((edge_counts > 2).sum())
    boundary_length = float(np.linalg.norm(trace_vertices[boundary[:, 0]] - trace_vertices[boundary[:, 1]], axis=1).sum())
    watertight = bool(len(boundary) == 0 and non_manifold == 0)
    winding_consistent = _winding_consistent(trace_faces)
    if not watertight:
        warnings.append(f"the mesh is not closed ({len(boundary)} open edges after merging seams); "
                        "rays escaping through holes count as the full reach — run 'thickbake verify' on it")
    if not winding_consistent:
        warnings.append("some faces are wound opposite to their neighbours; their normals point inward — "
                        "run 'thickbake verify' on the mesh")

    cross = np.cross(triangles[:, 1] - triangles[:, 0], triangles[:, 2] - triangles[:, 0])
    double_area = np.linalg.norm(cross, axis=1)
    face_normals = np.divide(cross, double_area[:, None], out=np.zeros_like(cross), where=double_area[:, None] > 0)

    need = ~has_file_normals
    if need.any():
        computed = corner_normals(trace_faces, face_normals, double_area, CREASE_ANGLE_DEG)
        triangle_normals[need] = computed[need]
    lengths = np.linalg.norm(triangle_normals, axis=2, keepdims=True)
    bad = ~(lengths > 1e-12)
    triangle_normals = np.where(bad, face_normals[:, None, :], triangle_normals / np.where(bad, 1.0, lengths))

    report = MeshReport(
        faces=int(len(triangles)),
        vertices_in_file=int(vertices_in_file),
        vertices_merged=int(len(trace_vertices)),
        watertight=watertight,
        winding_consistent=winding_consistent,
        boundary_edges=int(len(boundary)),
        non_manifold_edges=non_manifold,
        boundary_length=boundary_length,
        volume=volume,
        area=float(double_area.sum() / 2),
        orientation_flipped=flipped,
        normals_from_file=bool(has_file_normals.all()),
        faces_without_uv=int((~has_uv).sum()),
        uv_outside_unit_square=outside,
        warnings=warnings,
    )
    if outside > 1e-6:
        report.warnings.append(f"{outside:.1%} of the UV area lies outside the 0–1 square and is not baked")
    return Asset(
        triangles=triangles, triangle_uv=np.where(has_uv[:, None, None], triangle_uv, 0.0),
        triangle_normals=triangle_normals, face_normals=face_normals, has_uv=has_uv,
        trace_vertices=trace_vertices, trace_faces=trace_faces, report=report,
        name=name, path=path, sha256=sha256,
    )


def _uv_area(uv: np.ndarray) -> np.ndarray:
    """(f,) absolute UV-space area of (f, 3, 2) UV triangles."""
    e1 = uv[:, 1] - uv[:, 0]
    e2 = uv[:, 2] - uv[:, 0]
    return np.abs(e1[:, 0] * e2[:, 1] - e1[:, 1] * e2[:, 0]) / 2


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
    directed = faces[:, [0, 1, 1, 2, 2, 0]].reshape(-1, 2)
    _, counts = np.unique(directed, axis=0, return_counts=True)
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
    offset_in_group = np.arange(len(left)) - np.repeat(np.cumsum(reps) - reps, reps)
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
