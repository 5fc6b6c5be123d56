"""Trace stage: first-hit distances, behind one small interface with two backends.

Both engines answer :meth:`first_hit` for float32 ray batches and count a hit on either side of a
triangle (an inward ray leaves the solid through a back face).  :class:`EmbreeEngine` (embreex, Intel
Embree) is the real one; it releases the GIL inside each call, so a thread pool over one shared scene
uses every core.  :class:`TrimeshEngine` (trimesh's pure-Python/rtree intersector) is the fallback
when embreex cannot be imported: correct, and about three orders of magnitude slower for rays that
start inside a mesh.  Both implement :class:`RayEngine`, the one interface the rest of the package
uses (any object with these methods works, e.g. a recorder wrapping an engine in a benchmark).
"""

from __future__ import annotations

import threading
import warnings
from typing import Protocol, runtime_checkable

import numpy as np

from thickbake.constants import EDGE_MARGIN_ULPS
from thickbake.geometry import triangle_edges, unique_rows


@runtime_checkable
class RayEngine(Protocol):
    """What the bake and the checks ask of a ray engine over one triangle mesh.

    Hits count on either side of a triangle (an inward ray leaves the solid through a back face).

    Attributes
    ----------
    name : str
        Recorded in the sidecar (e.g. ``"embree (robust scene)"``, ``"trimesh"``).
    """

    name: str

    def first_hit(self, origins: np.ndarray, directions: np.ndarray,
                  max_distance: float) -> tuple[np.ndarray, np.ndarray]:
        """Distance to the first hit along each ray, up to ``max_distance``.

        Parameters
        ----------
        origins, directions : (n, 3) float32, C-contiguous
            Scene units; directions of unit length.
        max_distance : float
            Scene units; hits beyond it are ignored.

        Returns
        -------
        distance : (n,) float32
            Hit distance, or ``max_distance`` for rays that hit nothing within it.
        hit : (n,) bool
        """
        ...

    def first_hit_faces(self, origins: np.ndarray, directions: np.ndarray,
                        max_distance: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Like :meth:`first_hit`, plus the (n,) int64 index of the triangle hit (−1 for misses)."""
        ...


#: Scene modes of :class:`EmbreeEngine`.
EMBREE_MODES = ("guarded", "robust", "fast")


def _face_table(vertices: np.ndarray, faces: np.ndarray):
    """Per-face float32 table for the plane distance and the edge test, and the edge margin.

    Columns: v0 (3), unit normal n (3), in-plane unit normals of edges v0v1, v0v2 and v1v2 pointing
    into the triangle (3 each), and m12·(v1 − v0) (1): the signed distance of an in-plane point p to
    the edges is m01·(p − v0), m02·(p − v0), m12·(p − v0) − m12·(v1 − v0).  Degenerate triangles get
    zero normals (their distances come out NaN and count as suspect).

    Returns
    -------
    table : (f, 16) float32
    margin : float32
        Scene units.
    """
    v = np.asarray(vertices, np.float64)
    tri = v[np.asarray(faces, np.int64)]
    v0, v1, v2 = tri[:, 0], tri[:, 1], tri[:, 2]

    def unit(x):
        length = np.linalg.norm(x, axis=1, keepdims=True)
        return np.divide(x, length, out=np.zeros_like(x), where=length > 0)

    n = unit(np.cross(v1 - v0, v2 - v0))

    def inward(a, b, opposite):
        m = unit(np.cross(n, b - a))
        flip = np.einsum("ij,ij->i", m, opposite - a) < 0
        m[flip] *= -1
        return m

    m01, m02, m12 = inward(v0, v1, v2), inward(v0, v2, v1), inward(v1, v2, v0)
    c12 = np.einsum("ij,ij->i", m12, v1 - v0)[:, None]
    table = np.ascontiguousarray(np.concatenate([v0, n, m01, m02, m12, c12], axis=1), dtype=np.float32)
    scale = float(np.abs(v).max()) if len(v) else 1.0
    return table, np.float32(EDGE_MARGIN_ULPS * 2.0 ** -23 * max(scale, 1e-30))


class EmbreeEngine:
    """Embree scenes over one triangle mesh: a fast scene with a leak guard, or a robust scene alone.

    Embree's robust mode (``RTC_SCENE_FLAG_ROBUST``) avoids arithmetic shortcuts so that rays do not
    slip between neighbouring triangles; the default, non-robust mode is about 1.15–1.2× faster but
    lets a ray aimed within round-off of a shared edge or vertex pass through a closed surface (one
    in a few million of a bake's rays; most of those aimed exactly at vertices).  ``mode="guarded"``
    traces every ray in the fast scene and re-traces in the robust scene every ray whose answer may
    be such a leak:

    * a ray that hit nothing, when the mesh is closed (``closed=True``: no open or non-manifold edge
      after welding) — an inward ray must leave a closed solid through its surface;
    * a ray whose first hit is a *front* face (geometric normal against the ray, d·n < 0) — an inward
      ray leaves a consistently wound closed solid through a back face, and after slipping out
      through a leak the next surface a ray meets is a front face.

    The two modes also round hit distances differently (robust mode divides exactly where the fast
    one uses an approximate reciprocal: 40% of distances differ in the last float32 bit), so the
    engine asks Embree only *which* triangle is hit and computes the distance itself from that
    triangle's plane, t = ((v₀ − o)·n) / (d·n), in float32 (the same operations for every mode).
    A ray then gets the same answer from the guarded and the robust-only engine whenever both report
    the same triangle.  They can disagree without a leak only where a ray passes within round-off of
    an edge (two triangles both "hit"), so a third rule re-traces those too:

    * a hit whose point lies within :data:`~thickbake.constants.EDGE_MARGIN_ULPS` float32 ulps of the scene's largest
      coordinate of its triangle's nearest edge (scaled by 1/|d·n|, since a grazing ray's hit point is
      less certain): about 0.1–1% of a bake's rays.

    With the three rules the guarded engine's answers equal the robust-only engine's for rays that
    start strictly inside closed, consistently wound meshes (a positive ``--bias``; a ray starting
    exactly on a face may or may not hit that face, depending on the scene's arithmetic) (tests/test_leak_guard.py checks it on rays aimed exactly at edges and
    vertices, where the fast scene leaks).  On meshes with intersecting parts a ray that leaks out of
    one part can meet a back face of another, which no rule sees.

    Parameters
    ----------
    vertices : (m, 3) float
        Scene units.
    faces : (f, 3) int
    closed : bool
        Whether the mesh is closed (:attr:`MeshReport.watertight`): lets misses be re-traced.
    mode : {"guarded", "robust", "fast"}
        ``fast`` (no guard) exists for measurements and tests only.
    """

    def __init__(self, vertices: np.ndarray, faces: np.ndarray, *, closed: bool = False, mode: str = "guarded"):
        from embreex import rtcore_scene
        from embreex.mesh_construction import TriangleMesh

        if mode not in EMBREE_MODES:
            raise ValueError(f"unknown Embree mode {mode!r}")
        self.mode = mode
        self.closed = bool(closed)
        self.name = {"robust": "embree (robust scene)", "fast": "embree (fast scene, no leak guard)",
                     "guarded": "embree (fast scene, suspect rays re-traced in a robust scene)"}[mode]
        v = np.ascontiguousarray(vertices, dtype=np.float32)
        f = np.ascontiguousarray(faces, dtype=np.int32)
        self._meshes = []
        self._fast = self._robust = None
        if mode in ("guarded", "fast"):
            self._fast = rtcore_scene.EmbreeScene(robust=False)
            self._meshes.append(TriangleMesh(self._fast, v, f))
        if mode in ("guarded", "robust"):
            self._robust = rtcore_scene.EmbreeScene(robust=True)
            self._meshes.append(TriangleMesh(self._robust, v, f))
        table, self._edge_margin = _face_table(vertices, faces)
        self._planes = np.ascontiguousarray(table.T)          # (16, f): one contiguous column per field
        self._lock = threading.Lock()
        #: Rays traced (first pass) and rays re-traced in the robust scene since construction.
        self.rays_traced = 0
        self.rays_retraced = 0
        # commit the BVHs now, single-threaded, rather than racing on the first concurrent calls
        for scene in (self._fast, self._robust):
            if scene is not None:
                scene.run(np.zeros((1, 3), np.float32), np.ones((1, 3), np.float32), query="DISTANCE")

    def _faces(self, scene, origins, directions, limit):
        tfar = np.full(len(origins), limit, dtype=np.float32)
        return scene.run(origins, directions, dists=tfar, query="INTERSECT").astype(np.int64)

    def _plane_distance(self, face, origins, directions):
        """Distance to the plane of each hit face, d·n, and whether the hit lies near an edge.

        Returns (n,) float32 t, (n,) float32 d·n (0 for misses) and (n,) bool near-edge: the hit point's
        distance to the nearest edge of its triangle, times |d·n| (a grazing ray's hit point is less
        certain), is below the margin.
        """
        f = np.maximum(face, 0)
        col = [column.take(f) for column in self._planes]                         # 16 × (n,), contiguous
        o, d = origins.T, directions.T
        w = [col[j] - o[j] for j in range(3)]                                        # v0 − o
        den = d[0] * col[3]
        den += d[1] * col[4]
        den += d[2] * col[5]
        num = w[0] * col[3]
        num += w[1] * col[4]
        num += w[2] * col[5]
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            t = num / den
            q = []                                                                   # hit point − v0
            for j in range(3):
                qj = t * d[j]
                qj -= w[j]
                q.append(qj)

            def edge_distance(first):
                out = q[0] * col[first]
                out += q[1] * col[first + 1]
                out += q[2] * col[first + 2]
                return out

            edge = edge_distance(6)
            np.minimum(edge, edge_distance(9), out=edge)
            e12 = edge_distance(12)
            e12 -= col[15]
            np.minimum(edge, e12, out=edge)
            edge *= np.abs(den)
            near = ~(edge >= self._edge_margin)      # NaN (degenerate) counts as near
        hit = face >= 0
        return t, np.where(hit, den, np.float32(0)), hit & near

    def first_hit_faces(self, origins: np.ndarray, directions: np.ndarray, max_distance: float):
        """Distance to the first hit along each ray, whether it hit, and the triangle hit.

        Parameters
        ----------
        origins, directions : (n, 3) float32, C-contiguous
            Directions must be unit length (distances are then in scene units).
        max_distance : float
            Scene units; hits beyond it are ignored.

        Returns
        -------
        distance : (n,) float32
            Distance to the hit triangle's plane, or ``max_distance`` for rays that hit nothing within it.
        hit : (n,) bool
        face : (n,) int64
            Triangle hit, −1 for misses.
        """
        limit = np.float32(max_distance)
        scene = self._robust if self.mode == "robust" else self._fast
        face = self._faces(scene, origins, directions, limit)
        t, den, near = self._plane_distance(face, origins, directions)
        retraced = 0
        if self.mode == "guarded":
            suspect = ((face >= 0) & (den < 0)) | near
            if self.closed:
                suspect |= face < 0
            index = np.flatnonzero(suspect)
            retraced = len(index)
            if retraced:
                o = np.ascontiguousarray(origins[index])
                d = np.ascontiguousarray(directions[index])
                face[index] = self._faces(self._robust, o, d, limit)
                t[index] = self._plane_distance(face[index], o, d)[0]
        hit = face >= 0
        bad = hit & ~np.isfinite(t)
        if bad.any():  # a hit on a degenerate triangle (no plane): fall back to Embree's own distance
            index = np.flatnonzero(bad)
            tfar = np.full(len(index), limit, dtype=np.float32)
            t[index] = (self._robust or self._fast).run(np.ascontiguousarray(origins[index]),
                                                          np.ascontiguousarray(directions[index]),
                                                          dists=tfar, query="DISTANCE")
        with self._lock:
            self.rays_traced += len(origins)
            self.rays_retraced += retraced
        return np.where(hit, t, limit).astype(np.float32, copy=False), hit, np.where(hit, face, -1)

    def first_hit(self, origins: np.ndarray, directions: np.ndarray, max_distance: float):
        """Like :meth:`first_hit_faces` without the triangle: (n,) float32 distance and (n,) bool hit."""
        distance, hit, _ = self.first_hit_faces(origins, directions, max_distance)
        return distance, hit


class TrimeshEngine:
    """trimesh's ``RayMeshIntersector`` (rtree BVH + vectorised triangle tests); slow fallback."""

    name = "trimesh"

    def __init__(self, vertices: np.ndarray, faces: np.ndarray):
        import trimesh
        from trimesh.ray.ray_triangle import RayMeshIntersector

        self._mesh = trimesh.Trimesh(np.asarray(vertices, np.float64), np.asarray(faces, np.int64), process=False)
        self._intersector = RayMeshIntersector(self._mesh)

    def first_hit_faces(self, origins: np.ndarray, directions: np.ndarray, max_distance: float):
        n = len(origins)
        distance = np.full(n, np.float32(max_distance), dtype=np.float32)
        face = np.full(n, -1, dtype=np.int64)
        if n == 0:
            return distance, np.zeros(0, bool), face
        o = np.asarray(origins, np.float64)
        d = np.asarray(directions, np.float64)
        locations, index_ray, index_tri = self._intersector.intersects_location(o, d, multiple_hits=True)
        if len(index_ray):
            t = np.einsum("ij,ij->i", locations - o[index_ray], d[index_ray])
            keep = (t > 0) & (t < max_distance)
            t, index_ray, index_tri = t[keep], index_ray[keep], index_tri[keep]
            order = np.lexsort((t, index_ray))
            t, index_ray, index_tri = t[order], index_ray[order], index_tri[order]
            first = np.r_[True, index_ray[1:] != index_ray[:-1]] if len(index_ray) else np.zeros(0, bool)
            distance[index_ray[first]] = t[first].astype(np.float32)
            face[index_ray[first]] = index_tri[first]
        return distance, face >= 0, face

    def first_hit(self, origins: np.ndarray, directions: np.ndarray, max_distance: float):
        distance, hit, _ = self.first_hit_faces(origins, directions, max_distance)
        return distance, hit


def closed_surface(faces: np.ndarray) -> bool:
    """Whether a triangle mesh is closed: every edge is shared by exactly two of its faces.

    Parameters
    ----------
    faces : (f, 3) int
        Triangles over vertices already merged by position (a trace mesh).
    """
    faces = np.asarray(faces, np.int64)
    if len(faces) == 0:
        return False
    _, counts = unique_rows(triangle_edges(faces), return_counts=True)
    return bool((counts == 2).all())


def make_engine(vertices: np.ndarray, faces: np.ndarray, backend: str = "auto", *,
                closed: bool = False) -> RayEngine:
    """The fastest available engine (``"auto"``: Embree's fast scene with the robust leak guard), or a
    named one (``"embree"`` the same, ``"embree-robust"`` the robust scene alone, ``"trimesh"``).

    ``closed`` says the mesh has no open edges (lets the guard re-trace escaping rays)."""
    if backend in ("auto", "embree", "embree-robust"):
        try:
            return EmbreeEngine(vertices, faces, closed=closed, mode="robust" if backend == "embree-robust" else "guarded")
        except ImportError:
            if backend != "auto":
                raise
            warnings.warn(
                "embreex is not installed: falling back to trimesh's ray intersector, which is about "
                "1000x slower. Install it with 'pip install embreex'.",
                RuntimeWarning, stacklevel=2,
            )
    return TrimeshEngine(vertices, faces)
