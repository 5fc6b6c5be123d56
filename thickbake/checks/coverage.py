"""Surface quadrature of a texel map: which surface points the bake sampled, and what area each texel truly covers.

The bake evaluates each texel at one point per stratum (the texel centre for K = 1, or a point clamped
onto the nearest triangle at island borders) and weights it by ``triangle world area / UV pixel
area`` — a midpoint rule.  The checks in :mod:`thickbake.verify` need two things the bake does not
return:

* :func:`texel_samples` — the very surface samples the bake used (same rasteriser, same map size),
  with their world positions and shading normals, so a closed form can be evaluated at the point
  each texel actually measured;
* :func:`exact_texel_coverage` — the exact world area of the surface whose UVs fall inside each
  texel square, and the centroid of that patch, by clipping every UV triangle against every texel
  square it touches.  Comparing it with the bake's midpoint weights bounds the quadrature error of an
  area-weighted mean (see :func:`weighted_mean_quadrature_bound`).

Clipping by Green's theorem
---------------------------
For a triangle T and the texel square Q = [x0, x0+1] × [y0, y0+1] (pixel units), with
g = 1_Q, G(x, y) = 1[x0 ≤ x ≤ x0+1] · (clamp(y, y0, y0+1) − y0) satisfies ∂G/∂y = g, so

    area(T ∩ Q) = −∮_∂T G dx        (∂T counter-clockwise)

(Green's theorem, e.g. Apostol, *Calculus* vol. II, §11.19).  Along each edge the integrand is
piecewise polynomial in the edge parameter with breaks where the edge crosses x0, x0+1, y0 or y0+1;
Simpson's rule on every piece is exact (it integrates cubics exactly, and the first-moment
integrands x·G and (clamp² − y0²)/2 are quadratic there).  Everything is vectorised over
(triangle, texel) candidate pairs in bounded batches.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from thickbake.geometry import expand_ranges, pixel_bounds
from thickbake.pipeline.texels import SurfaceSamples, pixel_triangles, place_samples, rasterise_tile

#: (triangle, texel) candidate pairs clipped at once; ~1 KiB of temporaries each.
CLIP_BATCH = 1 << 17


@dataclass
class TexelSamples:
    """The surface samples of a whole map, as the bake draws them.

    Attributes
    ----------
    samples : SurfaceSamples
        texel, face, bary, sub, area (world area of the stratum, 0 for border samples).
    positions : (n, 3) float64
        World position of each sample, scene units.
    normals : (n, 3) float64
        Outward unit shading normal the bake uses at each sample (its rays go around the negation).
    width, height : int
    """

    samples: SurfaceSamples
    positions: np.ndarray
    normals: np.ndarray
    width: int
    height: int

    def texel_mean(self, per_sample: np.ndarray) -> np.ndarray:
        """(h·w,) float64 mean over each texel's samples of a (n,) per-sample quantity (0 where none).

        The bake's texel value is the plain mean of its samples' means, so this is the matching
        reduction for an expected value evaluated per sample.
        """
        size = self.width * self.height
        count = np.bincount(self.samples.texel, minlength=size)
        total = np.bincount(self.samples.texel, weights=per_sample, minlength=size)
        return np.divide(total, count, out=np.zeros(size), where=count > 0)


def texel_samples(asset, width: int, height: int, supersample: int = 1, bias: float = 0.0) -> TexelSamples:
    """Re-draw the surface samples of a bake of ``asset`` at ``width`` × ``height``.

    Uses the bake's own rasteriser (:func:`thickbake.texels.rasterise_tile`) over one tile spanning
    the map, then the bake's own step that keeps samples a few biases off triangle edges; a texel's
    samples depend only on the triangles touching it, so this matches the tiled bake sample for
    sample.

    Parameters
    ----------
    asset : thickbake.pipeline.load.Asset
    width, height : int
        Map size, texels.
    supersample : int
        K (K × K strata per texel).
    bias : float
        The bake's resolved bias, scene units.

    Returns
    -------
    TexelSamples
    """
    tri_px, valid, jacobian, _ = pixel_triangles(asset.triangles, asset.triangle_uv, asset.has_uv, width, height)
    index = np.flatnonzero(valid)
    samples, _ = rasterise_tile(tri_px[index], index, jacobian[index], 0, 0, max(width, height), width, height,
                                supersample)
    positions, normals = place_samples(asset.triangles, asset.triangle_normals, asset.face_normals, samples,
                                       float(bias))
    return TexelSamples(samples, positions, normals, width, height)


# ---------------------------------------------------------------------------- exact coverage
def _clip_moments(p: np.ndarray, x0: np.ndarray, y0: np.ndarray) -> np.ndarray:
    """Signed area and first moments of triangles ∩ unit squares by Green's theorem.

    Parameters
    ----------
    p : (n, 3, 2) float64
        Triangle corners, pixel units.
    x0, y0 : (n,) float64
        Lower corner of each square.

    Returns
    -------
    (n, 3) float64
        (area, ∫∫x, ∫∫y) over T ∩ Q, signed by the triangle's orientation (positive when
        counter-clockwise in the (x, y) frame).
    """
    out = np.zeros((len(p), 3))
    x1, y1 = x0 + 1.0, y0 + 1.0
    for i in range(3):  # the three edges, not a per-pair loop
        a = p[:, i]
        b = p[:, (i + 1) % 3]
        d = b - a
        with np.errstate(divide="ignore", invalid="ignore"):
            breaks = np.stack([
                np.zeros(len(p)), np.ones(len(p)),
                (x0 - a[:, 0]) / d[:, 0], (x1 - a[:, 0]) / d[:, 0],
                (y0 - a[:, 1]) / d[:, 1], (y1 - a[:, 1]) / d[:, 1],
            ], axis=1)
        breaks = np.sort(np.clip(np.nan_to_num(breaks, nan=0.0, posinf=0.0, neginf=0.0), 0.0, 1.0), axis=1)
        lo, hi = breaks[:, :-1], breaks[:, 1:]
        dt = hi - lo
        mid = 0.5 * (lo + hi)
        # indicator of x in [x0, x1] is constant on each piece: take it at the piece's midpoint
        xm = a[:, None, 0] + mid * d[:, None, 0]
        inside_x = (xm >= x0[:, None]) & (xm <= x1[:, None])

        def integrand(t):
            x = a[:, None, 0] + t * d[:, None, 0]
            y = a[:, None, 1] + t * d[:, None, 1]
            cy = np.clip(y, y0[:, None], y1[:, None])
            g_area = cy - y0[:, None]
            g_x = x * g_area
            g_y = 0.5 * (cy * cy - y0[:, None] ** 2)
            return np.stack([g_area, g_x, g_y], axis=-1)

        simpson = (integrand(lo) + 4.0 * integrand(mid) + integrand(hi)) * (dt / 6.0)[..., None]
        simpson = np.where(inside_x[..., None], simpson, 0.0)
        out -= simpson.sum(axis=1) * d[:, None, 0]
    return out


@dataclass
class TexelCoverage:
    """Exact surface coverage of each texel (see :func:`exact_texel_coverage`).

    Attributes
    ----------
    area : (h·w,) float64
        World area of the surface whose UVs lie in the texel square, scene units².
    centroid : (h·w, 3) float64
        World centroid of that patch (0 where the area is 0), scene units.
    face_area : (f,) float64
        World area of each triangle (0 for triangles without UVs).
    face_covered : (f,) float64
        World area of each triangle whose UVs fall inside the map (equals face_area inside [0, 1]²).
    """

    area: np.ndarray
    centroid: np.ndarray
    face_area: np.ndarray
    face_covered: np.ndarray


def exact_texel_coverage(asset, width: int, height: int) -> TexelCoverage:
    """Clip every UV triangle against every texel square it touches (exact up to float64).

    Parameters
    ----------
    asset : thickbake.pipeline.load.Asset
    width, height : int

    Returns
    -------
    TexelCoverage
    """
    tri_px, valid, jacobian, world_area = pixel_triangles(asset.triangles, asset.triangle_uv, asset.has_uv, width, height)
    index = np.flatnonzero(valid)
    lo, hi = pixel_bounds(tri_px[index], width, height)
    nx = np.maximum(hi[:, 0] - lo[:, 0] + 1, 0)
    ny = np.maximum(hi[:, 1] - lo[:, 1] + 1, 0)
    count = nx * ny
    size = width * height
    area = np.zeros(size)
    moment = np.zeros((size, 3))
    face_covered = np.zeros(len(world_area))
    # affine map pixel -> world of each triangle: X = P0 + [e1 e2] M^-1 (x - x0)
    p = tri_px
    m = np.stack([p[:, 1] - p[:, 0], p[:, 2] - p[:, 0]], axis=2)            # (f, 2, 2) columns e1, e2
    det = m[:, 0, 0] * m[:, 1, 1] - m[:, 0, 1] * m[:, 1, 0]
    safe = np.where(det == 0, 1.0, det)
    adjugate = np.stack([np.stack([m[:, 1, 1], -m[:, 0, 1]], 1), np.stack([-m[:, 1, 0], m[:, 0, 0]], 1)], 1)
    inv = adjugate / safe[:, None, None]
    world_edges = np.stack([asset.triangles[:, 1] - asset.triangles[:, 0],
                            asset.triangles[:, 2] - asset.triangles[:, 0]], axis=2)  # (f, 3, 2)
    linear = world_edges @ inv                                               # (f, 3, 2): world per pixel
    offset = asset.triangles[:, 0] - np.einsum("fij,fj->fi", linear, p[:, 0])  # (f, 3)
    orient = np.sign(det)

    csum = np.cumsum(count)
    start = 0
    while start < len(index):
        base = csum[start - 1] if start else 0
        stop = max(int(np.searchsorted(csum, base + CLIP_BATCH, side="right")), start + 1)
        cnt = count[start:stop]
        local = np.repeat(np.arange(start, stop), cnt)
        k = expand_ranges(cnt)
        col = lo[local, 0] + k % nx[local]
        row = lo[local, 1] + k // nx[local]
        face = index[local]
        mom = _clip_moments(p[face], col.astype(np.float64), row.astype(np.float64)) * orient[face, None]
        keep = mom[:, 0] > 0
        face, col, row, mom = face[keep], col[keep], row[keep], mom[keep]
        texel = row * width + col
        w = mom[:, 0] * jacobian[face]
        area += np.bincount(texel, weights=w, minlength=size)
        # world first moment: J · (L · ∫∫(x, y) + b · area)
        wm = jacobian[face, None] * (np.einsum("nij,nj->ni", linear[face], mom[:, 1:]) + offset[face] * mom[:, :1])
        for axis in range(3):
            moment[:, axis] += np.bincount(texel, weights=wm[:, axis], minlength=size)
        face_covered += np.bincount(face, weights=w, minlength=len(world_area))
        start = stop
    centroid = np.divide(moment, area[:, None], out=np.zeros_like(moment), where=area[:, None] > 0)
    face_area = np.where(asset.has_uv, world_area, 0.0)
    return TexelCoverage(area=area, centroid=centroid, face_area=face_area, face_covered=face_covered)


@dataclass
class QuadratureBound:
    """Bound on the quadrature error of an area-weighted texel mean (measure units).

    Attributes
    ----------
    weights : float
        Bound on |Σ pᵢvᵢ − Σ qᵢvᵢ|, bake weights p against exact coverage weights q: the smaller of
        ½‖p − q‖₁ · (max v − min v) and Σ |aᵢ − wᵢ| · |vᵢ − M_w| / Σa.
    position : float
        lipschitz · Σ q_i |x_i − c_i|: each texel's sample point x_i against its patch centroid c_i.
    missing_share : float
        Share of the surface area whose UVs fall outside the map (never sampled).
    """

    weights: float
    position: float
    missing_share: float

    @property
    def total(self) -> float:
        return self.weights + self.position


def weighted_mean_quadrature_bound(values: np.ndarray, bake_area: np.ndarray, coverage: TexelCoverage,
                                   sample_points: np.ndarray, lipschitz: float) -> QuadratureBound:
    """How far the bake's area-weighted mean can be from the exact surface mean of the same function.

    Write the bake's mean as M = Σ pᵢvᵢ with pᵢ = aᵢ/Σa (midpoint weights) and the exact surface
    mean as Σ qᵢ v̄ᵢ with qᵢ = wᵢ/Σw (exact coverage) and v̄ᵢ the mean of v over texel i's patch.  Then

        |Σ pᵢvᵢ − Σ qᵢv̄ᵢ| ≤ |Σ (pᵢ − qᵢ) vᵢ| + Σ qᵢ |vᵢ − v̄ᵢ|,

    and for the first term both ½‖p − q‖₁ (max v − min v) (both weight vectors sum to one, so the
    mid-range can be subtracted) and Σ |aᵢ − wᵢ| |vᵢ − M_w| / Σa (the identity
    M − M_w = Σ (aᵢ − wᵢ)(vᵢ − M_w) / Σa, M_w = Σ qᵢvᵢ, with Σw the surface area) are upper bounds;
    the smaller is used.  The second term is at most λ Σ qᵢ |xᵢ − cᵢ| + O(h²) with λ a Lipschitz
    constant of v and the sample point xᵢ against the patch centroid cᵢ (a linear v has
    v̄ᵢ = v(cᵢ)); the O(h²) curvature term of the midpoint rule is not included.

    Parameters
    ----------
    values : (h·w,) float64
        Texel values vᵢ (measured).
    bake_area : (h·w,) float64
        The bake's weights aᵢ (``BakeResult.area``), scene units².
    coverage : TexelCoverage
        Exact weights and centroids.
    sample_points : (h·w, 3) float64
        Mean sample position of each texel.
    lipschitz : float
        λ, measure units per scene unit.
    """
    a = np.asarray(bake_area, np.float64)
    w = coverage.area
    used = (a > 0) | (w > 0)
    p = a / a.sum()
    q = w / w.sum()
    v = values[used]
    spread = float(v.max() - v.min()) if v.size else 0.0
    mean_exact = float((q * values).sum())
    weights = min(0.5 * float(np.abs(p - q).sum()) * spread,
                  float((np.abs(a - w) * np.abs(values - mean_exact))[used].sum() / a.sum()))
    distance = np.linalg.norm(sample_points - coverage.centroid, axis=1)
    position = lipschitz * float((q * np.where(w > 0, distance, 0.0)).sum())
    total_area = coverage.face_area.sum()
    missing = float(1.0 - coverage.face_covered.sum() / total_area) if total_area > 0 else 0.0
    return QuadratureBound(weights=weights, position=position, missing_share=max(missing, 0.0))


__all__ = ["TexelSamples", "texel_samples", "TexelCoverage", "exact_texel_coverage", "QuadratureBound",
           "weighted_mean_quadrature_bound", "CLIP_BATCH"]
