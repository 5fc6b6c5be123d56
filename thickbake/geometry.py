"""Triangle and index-range primitives, each computed in one place.

Array in, array out, no files or settings: the load stage, the rasteriser, the mesh checks, the
coverage quadrature and ``scripts/make_samples.py`` all take their triangle cross products, areas and
normals, their clamped pixel bounding boxes and their expanded index ranges from here, so the same
quantity is always computed with the same floating-point operations.

>>> tri = np.array([[[0.0, 0, 0], [2, 0, 0], [0, 1, 0]]])
>>> double_areas(tri)
array([2.])
>>> unit_normals(tri)
array([[0., 0., 1.]])
"""

from __future__ import annotations

import numpy as np


def triangle_cross(triangles: np.ndarray) -> np.ndarray:
    """(f, 3) float64 (p1 − p0) × (p2 − p0) of (f, 3, 3) corners: twice the area along the normal.

    Points outward for counter-clockwise winding seen from outside; units are scene units².
    """
    return np.cross(triangles[:, 1] - triangles[:, 0], triangles[:, 2] - triangles[:, 0])


def double_areas(triangles: np.ndarray, cross: np.ndarray | None = None) -> np.ndarray:
    """(f,) float64 twice the area of each (f, 3, 3) triangle, scene units² (``cross`` if already known)."""
    return np.linalg.norm(triangle_cross(triangles) if cross is None else cross, axis=1)


def unit_normals(triangles: np.ndarray, cross: np.ndarray | None = None,
                 double_area: np.ndarray | None = None) -> np.ndarray:
    """(f, 3) float64 outward unit normal of each triangle; zero for degenerate (zero-area) ones."""
    cross = triangle_cross(triangles) if cross is None else cross
    double_area = double_areas(triangles, cross) if double_area is None else double_area
    return np.divide(cross, double_area[:, None], out=np.zeros_like(cross), where=double_area[:, None] > 0)


def uv_areas(uv: np.ndarray) -> np.ndarray:
    """(f,) absolute area of (f, 3, 2) 2-D triangles (UV or pixel coordinates), in their units²."""
    e1 = uv[:, 1] - uv[:, 0]
    e2 = uv[:, 2] - uv[:, 0]
    return np.abs(e1[:, 0] * e2[:, 1] - e1[:, 1] * e2[:, 0]) / 2


def pixel_bounds(tri_px: np.ndarray, width: int, height: int) -> tuple[np.ndarray, np.ndarray]:
    """Inclusive texel index ranges each pixel-space triangle's bounding box covers, clamped to the map.

    Parameters
    ----------
    tri_px : (f, 3, 2) float64
        Corners in pixel coordinates (x right, y down).
    width, height : int
        Map size, texels.

    Returns
    -------
    lo, hi : (f, 2) int64
        First and last (col, row) touched; ``hi < lo`` in an axis where the triangle lies off the map.
    """
    lo = np.floor(tri_px.min(axis=1)).astype(np.int64)
    hi = np.ceil(tri_px.max(axis=1)).astype(np.int64) - 1
    lo = np.maximum(lo, 0)
    hi[:, 0] = np.minimum(hi[:, 0], width - 1)
    hi[:, 1] = np.minimum(hi[:, 1], height - 1)
    return lo, hi


def expand_ranges(count: np.ndarray) -> np.ndarray:
    """Position of every item within its group, for groups of ``count`` items laid end to end.

    ``count`` (g,) int64 → (Σcount,) int64 ``[0, 1, …, count[0]−1, 0, 1, …]``; with
    ``np.repeat(group_ids, count)`` it enumerates every (group, k) pair without a Python loop.
    """
    return np.arange(count.sum()) - np.repeat(np.cumsum(count) - count, count)


__all__ = ["triangle_cross", "double_areas", "unit_normals", "uv_areas", "pixel_bounds", "expand_ranges"]
