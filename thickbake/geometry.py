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


def triangle_edges(faces: np.ndarray, *, directed: bool = False) -> np.ndarray:
    """(3f, 2) int64 edges of (f, 3) triangles, face by face: (v0, v1), (v1, v2), (v2, v0).

    ``directed`` keeps each edge in the face's winding order; otherwise each row is sorted, so the two
    faces sharing an edge give the same row whatever their winding.
    """
    edges = np.asarray(faces, np.int64)[:, [0, 1, 1, 2, 2, 0]].reshape(-1, 2)
    return edges if directed else np.sort(edges, axis=1)


def unique_rows(rows: np.ndarray, *, return_index: bool = False, return_inverse: bool = False,
                return_counts: bool = False):
    """``np.unique(rows, axis=0, ...)`` for (n, k) integer rows, through one int64 key per row.

    numpy sorts rows as opaque byte strings, about four times slower than sorting int64 keys.  Each
    column is offset to start at 0 (or, when the columns' ranges multiplied would not fit in 62 bits,
    replaced by its rank among the column's distinct values, which keeps the order) and the columns
    are combined in mixed radix, first column most significant: the keys sort exactly as the rows do
    lexicographically, so every output equals numpy's, in the same order.  Rows whose ranked columns
    still overflow go to ``np.unique`` itself.

    Returns the unique (u, k) rows, then (u,) first indices, (n,) inverse and (u,) counts as asked.

    >>> unique_rows(np.array([[2, 1], [0, 5], [2, 1]]), return_counts=True)
    (array([[0, 5],
           [2, 1]]), array([1, 2]))
    """
    rows = np.asarray(rows)
    keys = _row_keys(rows)
    if keys is None:
        return np.unique(rows, axis=0, return_index=return_index, return_inverse=return_inverse,
                         return_counts=return_counts)
    _, first, inverse, counts = np.unique(keys, return_index=True, return_inverse=True, return_counts=True)
    out = [rows[first]]
    if return_index:
        out.append(first)
    if return_inverse:
        out.append(inverse.reshape(-1))
    if return_counts:
        out.append(counts)
    return out[0] if len(out) == 1 else tuple(out)


def _row_keys(rows: np.ndarray) -> np.ndarray | None:
    """(n,) int64 keys ordered as the (n, k) integer rows are lexicographically, or None if none fit."""
    if rows.ndim != 2 or not np.issubdtype(rows.dtype, np.integer) or len(rows) == 0:
        return None
    columns = [c.astype(np.int64) - int(c.min()) for c in rows.T]
    spans = [int(c.max()) + 1 for c in columns]
    if np.prod(np.array(spans, dtype=float)) >= 2.0 ** 62:
        columns = [np.unique(c, return_inverse=True)[1].reshape(-1) for c in columns]
        spans = [int(c.max()) + 1 for c in columns]
        if np.prod(np.array(spans, dtype=float)) >= 2.0 ** 62:
            return None
    key = np.zeros(len(rows), np.int64)
    for column, span in zip(columns, spans):
        key *= span
        key += column
    return key


__all__ = ["triangle_cross", "double_areas", "unit_normals", "uv_areas", "pixel_bounds", "expand_ranges",
           "triangle_edges", "unique_rows"]
