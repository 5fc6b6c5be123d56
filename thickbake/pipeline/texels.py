"""Rasterise stage: turn UV triangles into surface samples, one tile of the map at a time.

Pixel space
-----------
A map of ``width`` × ``height`` texels is addressed in pixel coordinates ``x = u·width`` and
``y = (1 − v)·height``: texel (row, col) covers x ∈ [col, col+1), y ∈ [row, row+1), so row 0 of the
written image is v = 1 (OBJ/glTF convention after trimesh's V flip).  A texel's linear index is
``row·width + col``.

Which texels get samples
------------------------
1. *Centre claims.*  With supersampling K, each texel has K×K sub-positions at the centres of a K×K
   grid of strata (K = 1: the texel centre).  A sub-position inside a UV triangle becomes a surface
   sample of that triangle.  Points exactly on a shared edge go to one triangle only (the top-left
   fill rule of GPU rasterisers, evaluated exactly on a 1/256-texel fixed-point grid), so adjacent triangles of one island never both claim a texel; a
   sub-position claimed by two triangles therefore means overlapping UVs (stacked or mirrored
   islands), and the texel averages all its claims.
2. *Border texels.*  A texel that no sub-position of which lies in any triangle but whose square
   touches one (island borders) still gets one sample: its centre clamped to the closest point of the
   nearest touching triangle.  Seams are therefore never empty.

Each centre claim carries the world-space area its stratum represents (triangle world area / UV
pixel area / K²), a midpoint-rule quadrature of the surface; border samples carry zero area.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from thickbake.constants import DEGENERATE_NORMAL_LENGTH, EDGE_MARGIN_BIASES
from thickbake.geometry import double_areas, expand_ranges, pixel_bounds, uv_areas

#: Candidate (triangle, texel) pairs enumerated at once; bounds the rasteriser's working memory
#: (about 200 bytes each with supersampling temporaries).
CANDIDATE_BATCH = 1 << 20
#: Centre claims are decided on a fixed-point grid of 1/256 texel, as GPU rasterisers do, so edge
#: functions are exact integers: a texel centre on an edge or a vertex shared by several triangles
#: goes to exactly one of them.  Pixel coordinates up to 32768·256 = 2^23 keep products below 2^49.
SUBPIXEL = 256


@dataclass
class SurfaceSamples:
    """Surface samples of one tile.

    Attributes
    ----------
    texel : (n,) int64
        Linear texel index (row·width + col).
    face : (n,) int64
        Triangle index into the asset.
    bary : (n, 3) float64
        Barycentric coordinates of the sample in its triangle (inside or on it).
    sub : (n,) int64
        Sub-position index 0 … K²−1 (border samples use 0).
    area : (n,) float64
        World-space area represented, scene units² (0 for border samples).
    """

    texel: np.ndarray
    face: np.ndarray
    bary: np.ndarray
    sub: np.ndarray
    area: np.ndarray

    def __len__(self) -> int:
        return len(self.texel)

    @classmethod
    def empty(cls) -> "SurfaceSamples":
        return cls(np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros((0, 3)), np.zeros(0, np.int64), np.zeros(0))

    def take(self, index) -> "SurfaceSamples":
        return SurfaceSamples(self.texel[index], self.face[index], self.bary[index], self.sub[index], self.area[index])


def uv_to_pixels(triangle_uv: np.ndarray, width: int, height: int) -> np.ndarray:
    """(f, 3, 2) UVs (v up) → (f, 3, 2) pixel coordinates (x right, y down), float64."""
    px = np.empty_like(triangle_uv, dtype=np.float64)
    px[..., 0] = triangle_uv[..., 0] * width
    px[..., 1] = (1.0 - triangle_uv[..., 1]) * height
    return px


def pixel_triangles(triangles: np.ndarray, triangle_uv: np.ndarray, has_uv: np.ndarray, width: int, height: int):
    """Pixel-space triangles and the world area each texel of them represents.

    Parameters
    ----------
    triangles : (f, 3, 3) float64
        World corner positions, scene units.
    triangle_uv : (f, 3, 2) float64
    has_uv : (f,) bool
    width, height : int

    Returns
    -------
    tri_px : (f, 3, 2) float64
        Pixel coordinates (see :func:`uv_to_pixels`).
    valid : (f,) bool
        Triangles with UVs and non-zero UV area.
    jacobian : (f,) float64
        World area per texel of UV area, scene units² (0 where invalid).
    world_area : (f,) float64
        Triangle areas, scene units².
    """
    tri_px = uv_to_pixels(triangle_uv, width, height)
    uv_px_area = uv_areas(tri_px)
    world_area = double_areas(triangles) / 2
    valid = has_uv & (uv_px_area > 0)
    jacobian = np.divide(world_area, uv_px_area, out=np.zeros_like(world_area), where=uv_px_area > 0)
    return tri_px, valid, jacobian, world_area


def tile_buckets(tri_px: np.ndarray, valid: np.ndarray, width: int, height: int, tile: int):
    """Group triangles by the square tiles their pixel-space bounding boxes touch.

    Parameters
    ----------
    tri_px : (f, 3, 2) float64
        Triangles in pixel coordinates.
    valid : (f,) bool
        Triangles to rasterise (with UVs and non-zero UV area).
    width, height, tile : int
        Map size and tile side, texels.

    Returns
    -------
    tiles : (t, 2) int64
        (tile_row, tile_col) of every tile touched by at least one triangle, in row-major order.
    starts : (t + 1,) int64
        ``members[starts[i]:starts[i+1]]`` are the triangles touching tile i.
    members : (m,) int64
        Triangle indices.
    """
    lo, hi = pixel_bounds(tri_px, width, height)
    ok = valid & (hi[:, 0] >= lo[:, 0]) & (hi[:, 1] >= lo[:, 1])
    idx = np.flatnonzero(ok)
    t_lo = lo[idx] // tile
    t_hi = hi[idx] // tile
    nx = t_hi[:, 0] - t_lo[:, 0] + 1
    ny = t_hi[:, 1] - t_lo[:, 1] + 1
    count = nx * ny
    tri = np.repeat(idx, count)
    k = expand_ranges(count)
    nx_r = np.repeat(nx, count)
    tcol = np.repeat(t_lo[:, 0], count) + k % nx_r
    trow = np.repeat(t_lo[:, 1], count) + k // nx_r
    tiles_x = -(-width // tile)
    key = trow * tiles_x + tcol
    order = np.argsort(key, kind="stable")
    key, tri = key[order], tri[order]
    uniq, first = np.unique(key, return_index=True)
    starts = np.r_[first, len(key)].astype(np.int64)
    tiles = np.stack([uniq // tiles_x, uniq % tiles_x], axis=1)
    return tiles, starts, tri


def _edge_setup(p: np.ndarray):
    """Edge-function coefficients for (t, 3, 2) triangles, oriented to be ≥ 0 inside.

    Edge i runs from corner i+1 to corner i+2 (opposite corner i), so the edge function of edge i
    divided by twice the area is the barycentric weight of corner i.  Works on float pixel
    coordinates or on integer sub-pixel coordinates (then every value is exact).  Returns ``a, b, c``
    of E_i(x, y) = a_i·x + b_i·y + c_i, each (t, 3), the absolute double area (t,), and the tie flags
    (t, 3) bool of the fill rule.
    """
    p1 = p[:, [1, 2, 0]]
    p2 = p[:, [2, 0, 1]]
    # E(q) = (p2 - p1) × (q - p1) = (x2-x1)(qy-y1) - (y2-y1)(qx-x1)
    a = -(p2[..., 1] - p1[..., 1])
    b = p2[..., 0] - p1[..., 0]
    c = -(a * p1[..., 0] + b * p1[..., 1])
    double_area = a[:, 0] * p[:, 0, 0] + b[:, 0] * p[:, 0, 1] + c[:, 0]
    sign = np.where(double_area < 0, -1, 1).astype(a.dtype)
    a, b, c = a * sign[:, None], b * sign[:, None], c * sign[:, None]
    # A tie (E = 0) is owned by exactly one of the two triangles sharing the edge: the one in which
    # the oriented edge has a > 0, or a == 0 and b > 0 (reversing the edge flips both signs).
    tie = (a > 0) | ((a == 0) & (b > 0))
    return a, b, c, np.abs(double_area), tie


def rasterise_tile(tri_px: np.ndarray, tri_index: np.ndarray, jacobian: np.ndarray, tile_row: int,
                   tile_col: int, tile: int, width: int, height: int, supersample: int) -> tuple[SurfaceSamples, int]:
    """Surface samples of the texels of one tile.

    Parameters
    ----------
    tri_px : (t, 3, 2) float64
        Pixel-space corners of the triangles touching this tile.
    tri_index : (t,) int64
        Their indices in the asset.
    jacobian : (t,) float64
        World area per pixel² of UV area for each triangle, scene units² per texel.
    tile_row, tile_col, tile : int
        Tile position (in tiles) and side (in texels).
    width, height : int
        Map size in texels.
    supersample : int
        K (K×K sub-positions per texel).

    Returns
    -------
    samples : SurfaceSamples
        Sorted by (texel, sub, face).
    overlapped : int
        Number of texels in the tile with a sub-position claimed by more than one triangle.
    """
    x0, y0 = tile_col * tile, tile_row * tile
    x1, y1 = min(x0 + tile, width), min(y0 + tile, height)
    fixed = np.rint(tri_px * SUBPIXEL).astype(np.int64)
    ia, ib, ic, idouble_area, tie = _edge_setup(fixed)
    a, b, c, double_area, _ = _edge_setup(tri_px)
    keep = (double_area > 0) & (idouble_area > 0)
    tri_px, tri_index, jacobian = tri_px[keep], tri_index[keep], jacobian[keep]
    float_edges = (a[keep], b[keep], c[keep], double_area[keep])
    fixed_edges = (ia[keep], ib[keep], ic[keep], idouble_area[keep], tie[keep])

    lo, hi = pixel_bounds(tri_px, width, height)
    cx0 = np.maximum(lo[:, 0], x0)
    cy0 = np.maximum(lo[:, 1], y0)
    cx1 = np.minimum(hi[:, 0], x1 - 1)
    cy1 = np.minimum(hi[:, 1], y1 - 1)
    k2 = supersample * supersample
    claims, touched = _claims_and_touches(float_edges, fixed_edges, cx0, cy0, cx1, cy1, width, supersample)
    c_texel, c_sub, c_tri, c_bary = claims
    c_area = jacobian[c_tri] / k2
    overlapped = _overlapped_texels(c_texel, c_sub, k2)
    b_texel, b_tri, b_bary = _border_samples(tri_px, float_edges, touched, c_texel, width)

    texel = np.concatenate([c_texel, b_texel])
    local = np.concatenate([c_tri, b_tri])
    sub = np.concatenate([c_sub, np.zeros(len(b_texel), np.int64)])
    bary = np.concatenate([c_bary, b_bary])
    area = np.concatenate([c_area, np.zeros(len(b_texel))])
    face = tri_index[local]
    order = np.lexsort((face, sub, texel))
    samples = SurfaceSamples(texel[order], face[order], bary[order], sub[order], area[order])
    return samples, overlapped


def _claims_and_touches(float_edges, fixed_edges, cx0, cy0, cx1, cy1, width: int, supersample: int):
    """Centre claims at the sub-positions, and every (texel, triangle) pair whose square touches.

    Parameters
    ----------
    float_edges : tuple
        ``a, b, c`` (t, 3) and the double area (t,) of :func:`_edge_setup` on pixel coordinates.
    fixed_edges : tuple
        ``a, b, c``, double area and tie flags of :func:`_edge_setup` on the fixed-point grid.
    cx0, cy0, cx1, cy1 : (t,) int64
        Inclusive texel column and row ranges of each triangle within the tile.
    width, supersample : int

    Returns
    -------
    claims : tuple of (n,) int64 texel, (n,) int64 sub-position, (n,) int64 local triangle, (n, 3) bary
    touched : tuple of (m,) int64 texel, (m,) int64 local triangle
    """
    a, b, c, _ = float_edges
    ia, ib, ic, idouble_area, tie = fixed_edges
    nx = np.maximum(cx1 - cx0 + 1, 0)
    ny = np.maximum(cy1 - cy0 + 1, 0)
    count = nx * ny

    k2 = supersample * supersample
    sub_i = np.arange(k2)
    sub_dx = np.rint((sub_i % supersample + 0.5) / supersample * SUBPIXEL).astype(np.int64)
    sub_dy = np.rint((sub_i // supersample + 0.5) / supersample * SUBPIXEL).astype(np.int64)

    claims = []      # (texel, sub, local tri, bary...) for centre claims
    touched = []     # (texel, local tri) for texels whose square touches a triangle
    for lo_t, hi_t in _batches(count, max(1, CANDIDATE_BATCH // k2)):
        cnt = count[lo_t:hi_t]
        if cnt.sum() == 0:
            continue
        t = np.repeat(np.arange(lo_t, hi_t), cnt)
        k = expand_ranges(cnt)
        col = cx0[t] + k % nx[t]
        row = cy0[t] + k // nx[t]
        # square-overlap test: max of each edge function over the texel square must be >= 0
        ex = col[:, None] + 0.5
        ey = row[:, None] + 0.5
        e_centre = a[t] * ex + b[t] * ey + c[t]
        reach = 0.5 * (np.abs(a[t]) + np.abs(b[t]))
        touches = (e_centre + reach > 0).all(axis=1)  # strict: sharing only a boundary line is not touching
        touched.append((row[touches] * width + col[touches], t[touches]))
        # centre claims at the sub-positions
        tt = t[touches]
        colt, rowt = col[touches], row[touches]
        qx = colt[:, None] * SUBPIXEL + sub_dx[None, :]
        qy = rowt[:, None] * SUBPIXEL + sub_dy[None, :]
        e = (ia[tt][:, None, :] * qx[..., None] + ib[tt][:, None, :] * qy[..., None] + ic[tt][:, None, :])
        inside = ((e > 0) | ((e == 0) & tie[tt][:, None, :])).all(axis=2)
        ci, si = np.nonzero(inside)
        bary = e[ci, si] / idouble_area[tt[ci], None].astype(np.float64)
        claims.append((rowt[ci] * width + colt[ci], si, tt[ci], bary))

    if claims:
        c_texel = np.concatenate([x[0] for x in claims])
        c_sub = np.concatenate([x[1] for x in claims])
        c_tri = np.concatenate([x[2] for x in claims])
        c_bary = np.concatenate([x[3] for x in claims])
    else:
        c_texel = c_sub = c_tri = np.zeros(0, np.int64)
        c_bary = np.zeros((0, 3))
    if touched:
        t_texel = np.concatenate([x[0] for x in touched])
        t_tri = np.concatenate([x[1] for x in touched])
    else:
        t_texel = t_tri = np.zeros(0, np.int64)
    return (c_texel, c_sub, c_tri, c_bary), (t_texel, t_tri)


def _overlapped_texels(c_texel: np.ndarray, c_sub: np.ndarray, k2: int) -> int:
    """Texels with a (texel, sub-position) claimed more than once: overlapping UVs."""
    if not len(c_texel):
        return 0
    ts = c_texel * k2 + c_sub
    uniq_ts, ts_counts = np.unique(ts, return_counts=True)
    return len(np.unique(uniq_ts[ts_counts > 1] // k2))


def _border_samples(tri_px: np.ndarray, float_edges, touched, c_texel: np.ndarray, width: int):
    """One sample for each touched texel without a centre claim: its centre clamped onto the nearest triangle.

    Returns
    -------
    texel, tri : (b,) int64
        Border texels and the local triangle each samples.
    bary : (b, 3) float64
    """
    a, b, c, double_area = float_edges
    t_texel, t_tri = touched
    border = ~np.isin(t_texel, c_texel)
    t_texel, t_tri = t_texel[border], t_tri[border]
    if not len(t_texel):
        return np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros((0, 3))
    centre = np.stack([t_texel % width + 0.5, t_texel // width + 0.5], axis=1)
    closest, dist2 = closest_point_on_triangle_2d(tri_px[t_tri], centre)
    order = np.lexsort((t_tri, dist2, t_texel))
    t_texel, t_tri, closest = t_texel[order], t_tri[order], closest[order]
    first = np.r_[True, t_texel[1:] != t_texel[:-1]]
    b_texel, b_tri, closest = t_texel[first], t_tri[first], closest[first]
    e = a[b_tri] * closest[:, :1] + b[b_tri] * closest[:, 1:] + c[b_tri]
    b_bary = np.clip(e / double_area[b_tri, None], 0.0, None)
    b_bary /= b_bary.sum(axis=1, keepdims=True)
    return b_texel, b_tri, b_bary


def _batches(count: np.ndarray, budget: int):
    """Split triangles into runs whose summed candidate counts stay near ``budget``."""
    if len(count) == 0:
        return
    csum = np.cumsum(count)
    start = 0
    while start < len(count):
        base = csum[start - 1] if start else 0
        stop = int(np.searchsorted(csum, base + budget, side="right"))
        stop = max(stop, start + 1)
        yield start, stop
        start = stop


def closest_point_on_triangle_2d(tri: np.ndarray, q: np.ndarray):
    """Closest point of each 2-D triangle to a query point.

    Parameters
    ----------
    tri : (n, 3, 2) float64
    q : (n, 2) float64

    Returns
    -------
    point : (n, 2) float64
    dist2 : (n,) float64
        Squared distance (0 when q is inside).
    """
    best = None
    best_d2 = None
    for i in range(3):  # three edges, not a per-point loop
        p0 = tri[:, i]
        p1 = tri[:, (i + 1) % 3]
        d = p1 - p0
        length2 = np.einsum("ij,ij->i", d, d)
        s = np.clip(np.einsum("ij,ij->i", q - p0, d) / np.where(length2 > 0, length2, 1.0), 0.0, 1.0)
        p = p0 + s[:, None] * d
        d2 = np.einsum("ij,ij->i", q - p, q - p)
        if best is None:
            best, best_d2 = p, d2
        else:
            closer = d2 < best_d2
            best = np.where(closer[:, None], p, best)
            best_d2 = np.where(closer, d2, best_d2)
    # inside test (either orientation)
    e = []
    for i in range(3):
        p0 = tri[:, i]
        p1 = tri[:, (i + 1) % 3]
        e.append((p1[:, 0] - p0[:, 0]) * (q[:, 1] - p0[:, 1]) - (p1[:, 1] - p0[:, 1]) * (q[:, 0] - p0[:, 0]))
    e = np.stack(e, axis=1)
    inside = (e >= 0).all(axis=1) | (e <= 0).all(axis=1)
    best = np.where(inside[:, None], q, best)
    best_d2 = np.where(inside, 0.0, best_d2)
    return best, best_d2


def keep_off_edges(triangles: np.ndarray, face: np.ndarray, bary: np.ndarray, margin: float) -> np.ndarray:
    """Move samples that lie within ``margin`` of an edge of their triangle towards its centroid.

    A sample exactly on a mesh edge (island borders clamp texels onto edges) is a bad ray origin: at a
    sharp edge, stepping ``bias`` along one face's inward normal lands on or beyond the other face, and
    rays then start outside the solid.  Keeping every sample at least ``margin`` from its triangle's
    edges (or at the centroid of a triangle too small for that) prevents it.

    Parameters
    ----------
    triangles : (f, 3, 3) float64
        Corner positions, scene units.
    face : (n,) int64
    bary : (n, 3) float64
        Barycentric coordinates, inside or on the triangle.
    margin : float
        Scene units.

    Returns
    -------
    (n, 3) float64
        Barycentric coordinates with ``bary_i · height_i ≥ margin`` for every edge i (the distance to
        the edge opposite corner i), moved along the line to the centroid.
    """
    if margin <= 0 or len(face) == 0:
        return bary
    tri = triangles[face]
    opposite = tri[:, [2, 0, 1]] - tri[:, [1, 2, 0]]                       # edge opposite corner i
    double_area = double_areas(tri)
    length = np.linalg.norm(opposite, axis=2)
    height = double_area[:, None] / np.where(length > 0, length, np.inf)
    need = np.minimum(margin / np.where(height > 0, height, 1e-300), 1.0 / 3.0)  # bary required per edge
    short = bary < need
    if not short.any():
        return bary
    with np.errstate(divide="ignore", invalid="ignore"):
        step = np.where(short, (need - bary) / np.maximum(1.0 / 3.0 - bary, 1e-300), 0.0)
    lam = np.clip(step.max(axis=1), 0.0, 1.0)[:, None]
    return (1 - lam) * bary + lam / 3.0


def place_samples(triangles: np.ndarray, triangle_normals: np.ndarray, face_normals: np.ndarray,
                  samples: SurfaceSamples, bias: float):
    """Where the bake puts each sample: kept off triangle edges, then interpolated.

    The one place that turns rasterised samples into ray start points, shared by the bake and by
    ``thickbake verify`` so the two cannot drift apart.

    Returns
    -------
    positions, normals : (n, 3) float64
        As :func:`surface_points`, after :func:`keep_off_edges` with ``EDGE_MARGIN_BIASES · bias``.
    """
    bary = keep_off_edges(triangles, samples.face, samples.bary, EDGE_MARGIN_BIASES * bias)
    return surface_points(triangles, triangle_normals, face_normals, samples.face, bary)


def surface_points(triangles: np.ndarray, triangle_normals: np.ndarray, face_normals: np.ndarray,
                   face: np.ndarray, bary: np.ndarray):
    """World positions and outward unit shading normals of surface samples.

    Parameters
    ----------
    triangles : (f, 3, 3) float64
        Corner positions, scene units.
    triangle_normals : (f, 3, 3) float64
        Corner shading normals.
    face_normals : (f, 3) float64
        Geometric outward normals.
    face : (n,) int64
    bary : (n, 3) float64

    Returns
    -------
    positions : (n, 3) float64
    normals : (n, 3) float64
        Interpolated shading normal, flipped where it disagrees with the face it lies on (so the
        winding defines outside), renormalised.
    """
    positions = np.einsum("nk,nkj->nj", bary, triangles[face])
    normals = np.einsum("nk,nkj->nj", bary, triangle_normals[face])
    fn = face_normals[face]
    flip = np.einsum("ij,ij->i", normals, fn) < 0
    normals[flip] *= -1
    length = np.linalg.norm(normals, axis=1, keepdims=True)
    bad = ~(length[:, 0] > DEGENERATE_NORMAL_LENGTH)
    normals = np.where(bad[:, None], fn, normals / np.where(bad[:, None], 1.0, length))
    return positions, normals


def morton_order(texel: np.ndarray, width: int) -> np.ndarray:
    """Permutation that sorts linear texel indices into Z (Morton) order of (row, col)."""
    col = (texel % width).astype(np.uint64)
    row = (texel // width).astype(np.uint64)
    return np.argsort(_spread_bits(col) | (_spread_bits(row) << np.uint64(1)), kind="stable")


def _spread_bits(v: np.ndarray) -> np.ndarray:
    """Insert a zero bit between each of the low 16 bits of v (uint64)."""
    v = v & np.uint64(0xFFFF)
    v = (v | (v << np.uint64(8))) & np.uint64(0x00FF00FF)
    v = (v | (v << np.uint64(4))) & np.uint64(0x0F0F0F0F)
    v = (v | (v << np.uint64(2))) & np.uint64(0x33333333)
    v = (v | (v << np.uint64(1))) & np.uint64(0x55555555)
    return v
