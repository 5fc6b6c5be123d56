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

import warnings
from typing import Protocol, runtime_checkable

import numpy as np


@runtime_checkable
class RayEngine(Protocol):
    """What the bake and the checks ask of a ray engine over one triangle mesh.

    Hits count on either side of a triangle (an inward ray leaves the solid through a back face).

    Attributes
    ----------
    name : str
        Recorded in the sidecar (``"embree"``, ``"trimesh"``).
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


class EmbreeEngine:
    """Embree scene over one triangle mesh.

    Parameters
    ----------
    vertices : (m, 3) float
        Scene units.
    faces : (f, 3) int
    """

    name = "embree"

    def __init__(self, vertices: np.ndarray, faces: np.ndarray):
        from embreex import rtcore_scene
        from embreex.mesh_construction import TriangleMesh

        self._scene = rtcore_scene.EmbreeScene()
        self._mesh = TriangleMesh(self._scene, np.ascontiguousarray(vertices, dtype=np.float32),
                                  np.ascontiguousarray(faces, dtype=np.int32))
        # commit the BVH now, single-threaded, rather than racing on the first concurrent calls
        self._scene.run(np.zeros((1, 3), np.float32), np.ones((1, 3), np.float32), query="DISTANCE")

    def first_hit(self, origins: np.ndarray, directions: np.ndarray, max_distance: float):
        """Distance to the first hit along each ray, up to ``max_distance``.

        Parameters
        ----------
        origins, directions : (n, 3) float32, C-contiguous
            Directions must be unit length (distances are then in scene units).
        max_distance : float
            Scene units; hits beyond it are ignored.

        Returns
        -------
        distance : (n,) float32
            Hit distance, or ``max_distance`` for rays that hit nothing within it.
        hit : (n,) bool
        """
        limit = np.float32(max_distance)
        tfar = np.full(len(origins), limit, dtype=np.float32)
        distance = self._scene.run(origins, directions, dists=tfar, query="DISTANCE")
        return distance, distance < limit

    def first_hit_faces(self, origins: np.ndarray, directions: np.ndarray, max_distance: float):
        """Like :meth:`first_hit` plus the (n,) int64 index of the triangle hit (−1 for misses)."""
        tfar = np.full(len(origins), np.float32(max_distance), dtype=np.float32)
        out = self._scene.run(origins, directions, dists=tfar, query="INTERSECT", output=1)
        face = out["primID"].astype(np.int64)
        hit = face >= 0
        return np.where(hit, out["tfar"], np.float32(max_distance)).astype(np.float32), hit, np.where(hit, face, -1)


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


def make_engine(vertices: np.ndarray, faces: np.ndarray, backend: str = "auto") -> RayEngine:
    """The fastest available engine (``"auto"``), or a named one (``"embree"``, ``"trimesh"``)."""
    if backend in ("auto", "embree"):
        try:
            return EmbreeEngine(vertices, faces)
        except ImportError:
            if backend == "embree":
                raise
            warnings.warn(
                "embreex is not installed: falling back to trimesh's ray intersector, which is about "
                "1000x slower. Install it with 'pip install embreex'.",
                RuntimeWarning, stacklevel=2,
            )
    return TrimeshEngine(vertices, faces)
