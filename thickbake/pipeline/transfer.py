"""Transfer: measure the thickness in a source solid and write it to a target's UVs.

A real-time asset is often a low-polygon *target* (whose UVs receive the map) standing in for a
detailed or closed *source* solid (the sculpt, or a closed proxy) that light actually passes
through.  Every surface sample of the target is matched to a point of the source; the rays of the
bake then start there, along the source's own normal, exactly as in a bake of the source itself.

Matching a target point p with outward unit normal n
----------------------------------------------------
* **Search distance D** (default :data:`thickbake.constants.SEARCH_DIAGONAL_FRACTION` of the
  target's bounding-box diagonal): the line p + t·n is searched for |t| ≤ D, outwards and inwards,
  and the source crossing nearest to p is taken.
* **Cage** (a mesh with the same triangles, corner for corner, as the target, usually the target
  pushed outwards): the cage point c at the sample's barycentric coordinates sets the direction
  (c − p)/|c − p| and the distance |c − p|; the search runs from c through p and as far again beyond
  p, nearest to p first.  A cage built as p + D·n at every corner therefore matches what the
  search-distance mode does, while a hand-made cage can steer the search where the target's normals
  are a poor guide (hard edges, thin gaps).
* A crossing counts only where the source surface faces the same way as the search direction
  (positive dot product of its geometric normal with the direction): a surface facing the other
  way is the far side of a thin part, not the surface the target stands in for.

Samples that find no source point are *unprojected*: they get no value (never an invented one), are
counted, and their texels are left to seam padding.

The loader re-centres every mesh on its own bounding-box centre (``Asset.centre``); the source and
the cage are moved into the target's frame here, in float64, before anything is cast to float32.

Everything here is array-in/array-out; the driver (:mod:`thickbake.pipeline.driver`) calls
:meth:`Transfer.match` per tile.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np

from thickbake.geometry import unique_rows

from thickbake.constants import SEARCH_DIAGONAL_FRACTION
from thickbake.errors import ThickbakeError
from thickbake.pipeline.load import Asset, load_asset
from thickbake.pipeline.texels import EDGE_MARGIN_BIASES, SurfaceSamples, keep_off_edges, surface_points
from thickbake.pipeline.trace import RayEngine


@dataclass(frozen=True)
class SourceSolid:
    """The solid(s) a transfer bake measures in, merged into one traced mesh.

    Attributes
    ----------
    triangles : (f, 3, 3) float64
        Corner positions, scene units.
    triangle_normals : (f, 3, 3) float64
        Unit outward shading normal of each corner.
    face_normals : (f, 3) float64
        Unit outward geometric normals.
    trace_vertices : (m, 3) float64
    trace_faces : (f, 3) int64
        The same triangles over ``trace_vertices`` (row i is ``triangles[i]``).
    parts : tuple of Asset
        The loaded source files, in the order given (their reports and checksums).
    centre : (3,) float64
        World position the coordinates above are relative to.
    """

    triangles: np.ndarray
    triangle_normals: np.ndarray
    face_normals: np.ndarray
    trace_vertices: np.ndarray
    trace_faces: np.ndarray
    parts: tuple
    centre: np.ndarray

    def in_frame(self, centre: np.ndarray) -> "SourceSolid":
        """The same solid with coordinates relative to the world point ``centre`` (float64)."""
        shift = np.asarray(self.centre, np.float64) - np.asarray(centre, np.float64)
        if not shift.any():
            return self
        return SourceSolid(self.triangles + shift, self.triangle_normals, self.face_normals,
                           self.trace_vertices + shift, self.trace_faces, self.parts, np.asarray(centre, np.float64))

    @property
    def diagonal(self) -> float:
        """Bounding-box diagonal of all source parts, scene units."""
        return float(np.linalg.norm(self.trace_vertices.max(axis=0) - self.trace_vertices.min(axis=0)))

    @property
    def watertight(self) -> bool:
        """Every part is closed after welding seams (a measured solid needs an inside)."""
        return all(p.report.watertight for p in self.parts)

    def describe(self) -> list[dict]:
        """Per part: file name, sha256, closedness and volume (for sidecars and reports)."""
        return [{"file": p.name, "sha256": p.sha256, "watertight": p.report.watertight,
                 "boundary_edges": p.report.boundary_edges, "faces": p.report.faces,
                 "volume": p.report.volume} for p in self.parts]


def load_source(sources, centre=None) -> SourceSolid:
    """Load and merge the source solid(s) of a transfer bake; they need no UVs.

    Parameters
    ----------
    sources : path, trimesh object, Asset, or a list/tuple of these
        One source, or several (e.g. a sculpt split into parts); their triangles are traced together.
    centre : (3,) float, optional
        World point the merged coordinates are relative to (default: the first part's centre).
    """
    if isinstance(sources, (str, os.PathLike, Asset)) or not isinstance(sources, (list, tuple)):
        sources = [sources]
    if not sources:
        raise ThickbakeError("no source solid given", fix="name at least one source mesh")
    parts = tuple(s if isinstance(s, Asset) else load_asset(s, need_uv=False) for s in sources)
    centre = np.asarray(parts[0].centre if centre is None else centre, np.float64)
    shifts = [np.asarray(p.centre, np.float64) - centre for p in parts]
    offsets = np.cumsum([0] + [len(p.trace_vertices) for p in parts[:-1]])
    return SourceSolid(
        triangles=np.concatenate([p.triangles + d for p, d in zip(parts, shifts)]),
        triangle_normals=np.concatenate([p.triangle_normals for p in parts]),
        face_normals=np.concatenate([p.face_normals for p in parts]),
        trace_vertices=np.concatenate([p.trace_vertices + d for p, d in zip(parts, shifts)]),
        trace_faces=np.concatenate([p.trace_faces + o for p, o in zip(parts, offsets)]),
        parts=parts,
        centre=centre,
    )


def cage_triangles(target: Asset, cage) -> np.ndarray:
    """The cage's corner positions, checked to match the target triangle for triangle.

    Parameters
    ----------
    target : Asset
    cage : path, trimesh object or Asset
        Same triangles as the target (same count, same order, same corner order, same vertex sharing);
        only the positions differ.  It needs no UVs.

    Returns
    -------
    (f, 3, 3) float64
        Cage corner i of triangle j pairs with ``target.triangles[j, i]``, in the target's frame.
    """
    cage = cage if isinstance(cage, Asset) else load_asset(cage, need_uv=False)
    where = cage.path or cage.name
    if len(cage.triangles) != len(target.triangles):
        raise ThickbakeError(f"the cage has {len(cage.triangles)} triangles, the target {len(target.triangles)}",
                             path=where, fix="make the cage from a copy of the target, moving vertices only")
    triangles, faces = cage.triangles, cage.trace_faces
    if cage.report.orientation_flipped != target.report.orientation_flipped:
        # the loader reversed the corners of one of them (an inside-out file): undo it so corners pair
        triangles, faces = triangles[:, ::-1], faces[:, ::-1]
    pairs = unique_rows(np.stack([target.trace_faces.ravel(), faces.ravel()], axis=1))
    if not (len(pairs) == len(np.unique(pairs[:, 0])) == len(np.unique(pairs[:, 1]))):
        raise ThickbakeError("the cage's triangles do not share vertices as the target's do (different topology)",
                             path=where, fix="make the cage from a copy of the target, moving vertices only")
    shift = np.asarray(cage.centre, np.float64) - np.asarray(target.centre, np.float64)
    return np.ascontiguousarray(triangles + shift)


def project(engine: RayEngine, face_normals: np.ndarray, points: np.ndarray, directions: np.ndarray,
            outward: np.ndarray, inward: np.ndarray):
    """Nearest source crossing of each search line, within its reach on either side.

    Parameters
    ----------
    engine : RayEngine
        Over the source solid (``first_hit_faces``).
    face_normals : (f, 3) float64
        Outward unit geometric normals of the source triangles.
    points : (n, 3) float64
        Target surface points, scene units.
    directions : (n, 3) float64
        Unit search directions (outward: the target normal, or towards the cage).
    outward, inward : (n,) float64
        How far to search along +direction and along −direction, scene units (0 searches nothing).

    Returns
    -------
    face : (n,) int64
        Source triangle crossed (−1 where none).
    offset : (n,) float64
        Signed distance from the target point to the crossing along ``directions``, scene units.
    found : (n,) bool
    """
    n = len(points)
    face = np.full(n, -1, np.int64)
    offset = np.zeros(n)
    best = np.full(n, np.inf)
    if n == 0:
        return face, offset, np.zeros(0, bool)
    origins = np.ascontiguousarray(points, np.float32)
    for sign, reach in ((1.0, outward), (-1.0, inward)):
        todo = np.flatnonzero(reach > 0)
        if len(todo) == 0:
            continue
        d = np.ascontiguousarray(sign * directions[todo], np.float32)
        # one call, the longest reach; each sample's own reach is applied to the distances after
        distance, hit, tri = engine.first_hit_faces(origins[todo], d, float(reach[todo].max()))
        distance = distance.astype(np.float64)
        facing = np.einsum("ij,ij->i", face_normals[np.maximum(tri, 0)], directions[todo]) > 0
        ok = hit & facing & (distance <= reach[todo]) & (distance < best[todo])
        idx = todo[ok]
        best[idx] = distance[ok]
        face[idx] = tri[ok]
        offset[idx] = sign * distance[ok]
    return face, offset, face >= 0


def barycentric(triangles: np.ndarray, points: np.ndarray) -> np.ndarray:
    """Barycentric coordinates of points projected onto their triangles' planes, clamped inside.

    Parameters
    ----------
    triangles : (n, 3, 3) float64
    points : (n, 3) float64
        Points on or near each triangle (a ray hit, within float32 rounding).

    Returns
    -------
    (n, 3) float64
        Non-negative, summing to 1 (a hit on an edge, or just past it by rounding, lands on the edge).
    """
    a, b, c = triangles[:, 0], triangles[:, 1], triangles[:, 2]
    e1, e2, q = b - a, c - a, points - a
    d11 = np.einsum("ij,ij->i", e1, e1)
    d12 = np.einsum("ij,ij->i", e1, e2)
    d22 = np.einsum("ij,ij->i", e2, e2)
    q1 = np.einsum("ij,ij->i", q, e1)
    q2 = np.einsum("ij,ij->i", q, e2)
    det = d11 * d22 - d12 * d12
    safe = np.where(det > 0, det, 1.0)
    v = np.where(det > 0, (d22 * q1 - d12 * q2) / safe, 1 / 3)
    w = np.where(det > 0, (d11 * q2 - d12 * q1) / safe, 1 / 3)
    bary = np.clip(np.stack([1 - v - w, v, w], axis=1), 0.0, None)
    return bary / bary.sum(axis=1, keepdims=True)


@dataclass(frozen=True)
class Transfer:
    """What a transfer bake shares across tiles: the source, its engine and how to search.

    Attributes
    ----------
    solid : SourceSolid
    engine : RayEngine
        Over ``solid``; the bake traces its rays in it.
    search_distance : float
        Scene units; the reach on both sides in search mode (unused with a cage).
    cage : (f, 3, 3) float64 or None
        Cage corners paired with the target's (:func:`cage_triangles`).
    cage_name : str or None
    cage_sha256 : str or None
    """

    solid: SourceSolid
    engine: RayEngine
    search_distance: float
    cage: np.ndarray | None = None
    cage_name: str | None = None
    cage_sha256: str | None = None

    def match(self, target: Asset, samples: SurfaceSamples, bias: float):
        """Source points of a tile's target samples.

        Parameters
        ----------
        target : Asset
        samples : SurfaceSamples
        bias : float
            Scene units; target and source samples are kept ``EDGE_MARGIN_BIASES · bias`` off their
            triangles' edges, as a bake of either mesh would (:func:`keep_off_edges`).

        Returns
        -------
        positions, normals : (k, 3) float64
            Source surface points and their outward unit shading normals (interpolated from the
            source triangle's corners), for the k samples that found one.
        face : (k,) int64
            The source triangle of each (index into ``solid.triangles``).
        found : (n,) bool
            Which samples found a source point.
        offset : (k,) float64
            Signed distance from the target point to the source point along the search direction.
        """
        margin = EDGE_MARGIN_BIASES * bias
        bary = keep_off_edges(target.triangles, samples.face, samples.bary, margin)
        points, normals = surface_points(target.triangles, target.triangle_normals, target.face_normals,
                                         samples.face, bary)
        if self.cage is None:
            directions = normals
            reach = np.full(len(points), self.search_distance)
        else:
            towards = np.einsum("nk,nkj->nj", bary, self.cage[samples.face]) - points
            reach = np.linalg.norm(towards, axis=1)
            directions = np.where(reach[:, None] > 0, towards / np.where(reach > 0, reach, 1.0)[:, None], normals)
        face, offset, found = project(self.engine, self.solid.face_normals, points, directions, reach, reach)
        face, offset = face[found], offset[found]
        hits = points[found] + offset[:, None] * directions[found]
        src_bary = barycentric(self.solid.triangles[face], hits)
        src_bary = keep_off_edges(self.solid.triangles, face, src_bary, margin)
        positions, src_normals = surface_points(self.solid.triangles, self.solid.triangle_normals,
                                                self.solid.face_normals, face, src_bary)
        return positions, src_normals, face, found, offset

    def describe(self) -> dict:
        """The sidecar's record of the transfer set-up (sources, cage, search distance)."""
        return {"sources": self.solid.describe(), "mode": "search distance" if self.cage is None else "cage",
                "search_distance": None if self.cage is not None else self.search_distance,
                "cage": None if self.cage is None else {"file": self.cage_name, "sha256": self.cage_sha256}}


def prepare_transfer(target: Asset, source, cage=None, search_distance: float | None = None,
                     engine: RayEngine | None = None) -> Transfer:
    """Load the source(s) and the cage and build the engine of a transfer bake.

    Parameters
    ----------
    target : Asset
    source : path, trimesh object, Asset, SourceSolid, or a list of the first three
    cage : path, trimesh object or Asset, optional
    search_distance : float, optional
        Scene units; default :data:`thickbake.constants.SEARCH_DIAGONAL_FRACTION` × the target's diagonal.
    engine : RayEngine, optional
        Over the source's trace mesh moved into the target's frame (``SourceSolid.in_frame(target.centre)``;
        the loader re-centres every mesh on its own bounding box); built if omitted.
    """
    if search_distance is not None:
        if isinstance(search_distance, bool) or not isinstance(search_distance, (int, float)) \
                or not np.isfinite(search_distance) or search_distance <= 0:
            raise ThickbakeError(f"search distance {search_distance!r} is not allowed",
                                 fix="give a positive distance in scene units")
        if cage is not None:
            raise ThickbakeError("a search distance and a cage were both given",
                                 fix="give one: the cage sets the search distance at every point")
    solid = (source if isinstance(source, SourceSolid) else load_source(source)).in_frame(target.centre)
    if engine is None:
        from thickbake.pipeline.trace import closed_surface, make_engine

        engine = make_engine(solid.trace_vertices, solid.trace_faces, closed=closed_surface(solid.trace_faces))
    corners = name = digest = None
    if cage is not None:
        cage_asset = cage if isinstance(cage, Asset) else load_asset(cage, need_uv=False)
        corners, name, digest = cage_triangles(target, cage_asset), cage_asset.name, cage_asset.sha256
    distance = float(search_distance) if search_distance is not None else SEARCH_DIAGONAL_FRACTION * target.diagonal
    return Transfer(solid=solid, engine=engine, search_distance=distance, cage=corners, cage_name=name,
                    cage_sha256=digest)


def distance_spread(offset: np.ndarray) -> dict:
    """p50, p95 and max of |projection distance| (scene units), None when there is none."""
    a = np.abs(np.asarray(offset, np.float64))
    if len(a) == 0:
        return {"p50": None, "p95": None, "max": None}
    return {"p50": float(np.percentile(a, 50)), "p95": float(np.percentile(a, 95)), "max": float(a.max())}


__all__ = ["SourceSolid", "Transfer", "load_source", "cage_triangles", "project",
           "barycentric", "prepare_transfer", "distance_spread"]
