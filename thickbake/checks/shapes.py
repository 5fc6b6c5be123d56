"""UV-mapped analytic solids and the closed forms a thickness bake can be checked against.

Every generator returns a :class:`Shape`: a closed, outward-wound triangle mesh laid out like an exported
asset (vertices split at UV seams and hard edges, several UV islands packed into the unit square with a
margin), together with the exact volume and area of the ideal smooth solid, the same two measures of the
faceted mesh, and the chord length along the inward normal from any surface point.

Conventions
-----------
* Lengths are in the caller's scene units; angles in radians.
* UVs follow the OBJ convention (v up, origin lower-left).  trimesh flips v when it writes or reads glTF,
  so the GLB files round-trip to the same numbers.
* Analytic solids are built with +z as the axis of revolution; the demo assets in ``samples/`` are
  turned to +y up by ``scripts/make_samples.py``.
* ``facet_error`` is an upper bound on the Hausdorff distance between the faceted mesh and the ideal
  surface.  For surfaces of revolution it is derived in :mod:`thickbake.surfaces` (see
  :func:`~thickbake.surfaces.revolve`); planar solids have 0.

The meshes are built with :mod:`thickbake.surfaces`.  Its building blocks (also used by
``scripts/make_samples.py``) are re-exported here, so ``from thickbake.shapes import revolve`` keeps
working: :class:`ProfilePiece`, :func:`line_piece`, :func:`arc_piece`, :func:`revolve`,
:func:`sphere_surface`, :func:`polycube_surface`, :class:`Surface`, :func:`join_surfaces`,
:func:`pack_islands`, :func:`assemble_mesh`, :func:`uv_islands`, :func:`obj_bytes`, :func:`glb_bytes`,
:data:`ISLAND_GAP`; and :func:`atomic_write_bytes` from :mod:`thickbake.maps.files`.

References
----------
.. [1] A. Cauchy, "Mémoire sur la rectification des courbes et la quadrature des surfaces courbes" (1832)
       -- title from memory.
.. [2] L. A. Santaló, *Integral Geometry and Geometric Probability*, Addison-Wesley (1976).
.. [3] A. Mazzolo, B. Roesslinger, W. Gille, "Properties of chord length distributions of nonconvex
       bodies", J. Math. Phys. 44:6195 (2003) -- from memory.
.. [4] T. L. Kay, J. T. Kajiya, "Ray tracing complex scenes", SIGGRAPH 1986 (slab test) -- from memory.
"""

from __future__ import annotations

import functools
import json
import math
import os  # noqa: F401  (unused here; tests/test_shapes.py patches shapes.os.replace)
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Sequence

import numpy as np
import trimesh

from thickbake.errors import ThickbakeError
from thickbake.lobes import lobe_named
from thickbake.maps.files import atomic_write_bytes
from thickbake.checks.surfaces import (
    ISLAND_GAP,
    ProfilePiece,
    Surface,
    _polycube_faces,
    _positive_int,
    _refined_polycube,
    arc_piece,
    assemble_mesh,
    glb_bytes,
    join_surfaces,
    line_piece,
    obj_bytes,
    pack_islands,
    polycube_surface,
    revolve,
    sphere_surface,
    uv_islands,
)
from thickbake.checks.surfaces import _cross2  # noqa: F401  (unused here; tests/test_shapes.py calls shapes._cross2)

from thickbake.checks import surfaces as _surfaces  # noqa: E402

#: The shapes and their closed forms, plus the builders of :mod:`thickbake.surfaces` re-exported.
__all__ = [
    "Shape", "sphere", "torus", "box", "capped_cylinder", "hollow_shell", "l_block", "shell_and_ball",
    "analytic_set", "write_shape_set", "shape_record", "SphereConeForms", "sphere_cone_forms", "sphere_cone_mean_chord",
    "sphere_cone_chord_second_moment", "sphere_cone_mean_transmittance", "atomic_write_bytes",
    *_surfaces.__all__,
]

_CAUCHY_SOURCE = (
    "4*V/S of the polyhedron actually traced (Cauchy's mean chord theorem: A. Cauchy 1832; "
    "L. A. Santaló, Integral Geometry and Geometric Probability, 1976): mean chord for surface points "
    "uniform by area and directions cosine-weighted about the inward normal"
)
_CAUCHY_NONCONVEX = (
    "; for a non-convex solid every chord segment counts as its own chord (Mazzolo, Roesslinger & Gille, "
    "J. Math. Phys. 44:6195, 2003 -- from memory)"
)
_REVOLVE_FACET = (
    "max over profile segments of rho_max*(1 - cos(pi/n)) + sag: the chord sag of the n-gon at the "
    "segment's largest radius plus the Hausdorff distance between the meridian curve and its polyline, "
    "by the triangle inequality through the revolved polyline (each planar trapezoid is a union of "
    "chords of circles of that polyline surface); see thickbake.shapes.revolve"
)


# --------------------------------------------------------------------------------------------------
# Shape
# --------------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Shape:
    """A UV-mapped analytic solid and its closed forms.

    Attributes
    ----------
    name : str
        File stem, e.g. ``"sphere"``.
    mesh : trimesh.Trimesh
        Closed, outward-wound mesh built with ``process=False``: vertices split at UV seams and hard
        edges (so the raw mesh is not watertight; merging by position makes it watertight), analytic
        outward ``vertex_normals``, ``visual.uv`` of shape ``(n_vertices, 2)`` in [0, 1]^2 (OBJ
        convention).  Shared, not copied: copy it before modifying.
    params : dict of str to float
        Defining dimensions in scene units.
    resolution : dict
        Tessellation settings the mesh was built with (counts, or ``max_edge`` in scene units).
    volume_exact, area_exact : float
        Volume and surface area of the ideal smooth solid (closed form).
    volume_mesh, area_mesh : float
        Volume and area of the faceted mesh (from trimesh).
    cauchy_mean_chord : float
        ``4 * volume_mesh / area_mesh``: the cosine-weighted mean chord of the polyhedron as traced.
    facet_error : float
        Upper bound on the distance between the faceted mesh and the ideal surface, scene units.
    sources : dict of str to str
        For each closed form, where it comes from.
    chord_kernel : callable or None
        ``(origins (n, 3), unit directions (n, 3)) -> (n,)`` first-hit distance against the ideal solid;
        use :meth:`ray_chord` / :meth:`normal_chord`, which validate their input.
    normal_kernel : callable or None
        ``points (n, 3) -> (n, 3)`` analytic outward normal; use :meth:`surface_normal`.
    """

    name: str
    mesh: trimesh.Trimesh
    params: dict
    resolution: dict
    volume_exact: float
    area_exact: float
    volume_mesh: float
    area_mesh: float
    cauchy_mean_chord: float
    facet_error: float
    sources: dict
    chord_kernel: Callable | None = field(default=None, repr=False)
    normal_kernel: Callable | None = field(default=None, repr=False)

    @property
    def cauchy_mean_chord_exact(self) -> float:
        """``4 * volume_exact / area_exact``: the mean chord of the ideal smooth solid."""
        return 4.0 * self.volume_exact / self.area_exact

    def ray_chord(self, points, directions):
        """First-hit distance from surface points along arbitrary inward directions, ideal solid.

        Exact ray arithmetic against the ideal surface (quadratic for spheres, quartic for the torus,
        slabs for boxes), so it is the reference for any lobe, not just the normal.

        Parameters
        ----------
        points : (n, 3) float64
            Ray origins on, or within ``facet_error`` of, the surface (scene units).
        directions : (n, 3) float64
            Directions pointing into the solid; normalised here.

        Returns
        -------
        (n,) float64 or None
            Distance to the next surface crossing, scene units; NaN where the ray does not enter the
            solid.  None if the shape has no closed form.
        """
        if self.chord_kernel is None:
            return None
        points, directions = _check_rays(points, directions, "directions")
        return self.chord_kernel(points, directions)

    def normal_chord(self, points, normals):
        """Chord length along ``-normals`` from points on the ideal surface.

        Parameters
        ----------
        points : (n, 3) float64
            World positions on, or within ``facet_error`` of, the surface.
        normals : (n, 3) float64
            Outward unit normals at those points (normalised here).

        Returns
        -------
        (n,) float64 or None
            Chord length in scene units (e.g. ``2 * radius`` on a sphere); None for shapes without a
            closed form.  See ``sources["normal_chord"]``.

        Examples
        --------
        >>> s = sphere(radius=2.0)
        >>> float(s.normal_chord([[0, 0, 2.0]], [[0, 0, 1.0]])[0])
        4.0
        """
        if self.chord_kernel is None:
            return None
        points, normals = _check_rays(points, normals, "normals")
        return self.chord_kernel(points, -normals)

    def surface_normal(self, points):
        """Analytic outward unit normal of the ideal surface nearest to each point.

        Parameters
        ----------
        points : (n, 3) float64
            Points on or near the surface.

        Returns
        -------
        (n, 3) float64 or None
        """
        if self.normal_kernel is None:
            return None
        points = np.asarray(points, dtype=np.float64)
        if points.ndim != 2 or points.shape[1] != 3:
            raise ValueError(f"points must have shape (n, 3), got {points.shape}")
        return self.normal_kernel(points)


def _check_rays(points, directions, what):
    points = np.asarray(points, dtype=np.float64)
    directions = np.asarray(directions, dtype=np.float64)
    if points.ndim != 2 or points.shape[1] != 3:
        raise ValueError(f"points must have shape (n, 3), got {points.shape}")
    if directions.shape != points.shape:
        raise ValueError(f"{what} must have the same shape as points {points.shape}, got {directions.shape}")
    length = np.linalg.norm(directions, axis=1, keepdims=True)
    if np.any(length == 0) or not np.all(np.isfinite(length)):
        raise ValueError(f"{what} must be finite and non-zero")
    return points, directions / length


# --------------------------------------------------------------------------------------------------
# Ray kernels against ideal surfaces (vectorised; loops only over a handful of primitives)
# --------------------------------------------------------------------------------------------------


def _next_root(roots):
    """Per row: the root that follows the one nearest zero (the start surface).  NaN if none."""
    r = np.where(np.isfinite(roots), roots, np.inf)
    r = np.sort(r, axis=1)
    start = np.argmin(np.abs(r), axis=1)
    nxt = np.minimum(start + 1, r.shape[1] - 1)
    out = r[np.arange(len(r)), nxt]
    out[(start + 1 >= r.shape[1]) | ~np.isfinite(out)] = np.nan
    return out


def _sphere_roots(origins, directions, centers, radii):
    """Ray parameters where unit-direction rays cross each sphere; NaN where they miss.  (n, 2k)."""
    out = []
    for c, rad in zip(centers, radii):
        oc = origins - c
        b = np.einsum("ij,ij->i", oc, directions)
        disc = b * b - (np.einsum("ij,ij->i", oc, oc) - rad * rad)
        root = np.sqrt(np.where(disc >= 0, disc, np.nan))
        out += [-b - root, -b + root]
    return np.column_stack(out)


def _spheres_chord(origins, directions, centers, radii):
    return _next_root(_sphere_roots(origins, directions, centers, radii))


def _spheres_normal(points, centers, radii, signs):
    d = np.stack([np.abs(np.linalg.norm(points - c, axis=1) - r) for c, r in zip(centers, radii)], 1)
    k = np.argmin(d, axis=1)
    c = np.asarray(centers, dtype=np.float64)[k]
    v = points - c
    return np.asarray(signs, dtype=np.float64)[k][:, None] * v / np.linalg.norm(v, axis=1, keepdims=True)


def _torus_chord(origins, directions, major, minor):
    """Next crossing of the torus (|x|^2 + R^2 - r^2)^2 = 4 R^2 (x^2 + y^2) after the start root.

    The quartic in the ray parameter is solved with companion-matrix eigenvalues (scaled by R), its
    real roots polished by two Newton steps.
    """
    o = origins / major
    d = directions
    rr = (minor / major) ** 2
    e = np.einsum("ij,ij->i", o, d)
    f = np.einsum("ij,ij->i", o, o) + 1.0 - rr
    dxy = d[:, 0] ** 2 + d[:, 1] ** 2
    oxy = o[:, 0] * d[:, 0] + o[:, 1] * d[:, 1]
    pxy = o[:, 0] ** 2 + o[:, 1] ** 2
    a3 = 4.0 * e
    a2 = 4.0 * e * e + 2.0 * f - 4.0 * dxy
    a1 = 4.0 * e * f - 8.0 * oxy
    a0 = f * f - 4.0 * pxy
    comp = np.zeros((len(o), 4, 4))
    comp[:, 0, :] = -np.column_stack((a3, a2, a1, a0))
    comp[:, 1, 0] = comp[:, 2, 1] = comp[:, 3, 2] = 1.0
    lam = np.linalg.eigvals(comp)
    t = np.where(np.abs(lam.imag) <= 1e-6, lam.real, np.nan)
    for _ in range(2):
        p = (((t + a3[:, None]) * t + a2[:, None]) * t + a1[:, None]) * t + a0[:, None]
        dp = ((4.0 * t + 3.0 * a3[:, None]) * t + 2.0 * a2[:, None]) * t + a1[:, None]
        step = np.where(dp != 0, p / np.where(dp != 0, dp, 1.0), 0.0)
        t = t - np.where(np.abs(step) < 1e-6, step, 0.0)  # polish only; leave near-double roots alone
    return _next_root(t) * major


def _torus_normal(points, major):
    rho = np.hypot(points[:, 0], points[:, 1])
    c = np.column_stack((major * points[:, 0] / rho, major * points[:, 1] / rho, np.zeros(len(points))))
    v = points - c
    return v / np.linalg.norm(v, axis=1, keepdims=True)


def _cylinder_chord(origins, directions, radius, half_height):
    """Exit distance from the convex capped cylinder |xy| <= r, |z| <= h/2 (far side and slab)."""
    a = directions[:, 0] ** 2 + directions[:, 1] ** 2
    b = origins[:, 0] * directions[:, 0] + origins[:, 1] * directions[:, 1]
    c = origins[:, 0] ** 2 + origins[:, 1] ** 2 - radius * radius
    disc = np.maximum(b * b - a * c, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        side = np.where(a > 0, (-b + np.sqrt(disc)) / a, np.inf)
        dz = directions[:, 2]
        slab = np.where(dz > 0, (half_height - origins[:, 2]) / dz,
                        np.where(dz < 0, (-half_height - origins[:, 2]) / dz, np.inf))
    return np.minimum(side, slab)


def _cylinder_normal(points, radius, half_height):
    rho = np.hypot(points[:, 0], points[:, 1])
    over_z = np.maximum(np.abs(points[:, 2]) - half_height, 0.0)
    over_r = np.maximum(rho - radius, 0.0)
    d = np.column_stack((np.abs(rho - radius) + over_z,
                         np.abs(points[:, 2] - half_height) + over_r,
                         np.abs(points[:, 2] + half_height) + over_r))
    k = np.argmin(d, axis=1)
    side = np.column_stack((points[:, 0] / rho, points[:, 1] / rho, np.zeros(len(points))))
    cap = np.column_stack((np.zeros(len(points)), np.zeros(len(points)), np.where(k == 1, 1.0, -1.0)))
    return np.where((k == 0)[:, None], side, cap)


def _boxes_chord(origins, directions, lo, hi, eps):
    """First exit from a union of axis-aligned boxes, starting on its boundary (slab test per box).

    The ray is inside box b for t in [t0_b, t1_b].  Starting from t = 0 the exit is extended through
    every box whose interval begins no later than the current exit (+eps) and ends after it; with k
    boxes k passes settle it.  NaN where the ray does not enter the union.
    """
    t0s, t1s = [], []
    with np.errstate(divide="ignore", invalid="ignore"):
        for blo, bhi in zip(lo, hi):
            ta = (blo - origins) / directions
            tb = (bhi - origins) / directions
            near = np.minimum(ta, tb)
            far = np.maximum(ta, tb)
            par = directions == 0
            inside = (origins >= blo - eps) & (origins <= bhi + eps)
            near = np.where(par, np.where(inside, -np.inf, np.inf), near)
            far = np.where(par, np.where(inside, np.inf, -np.inf), far)
            t0s.append(near.max(axis=1))
            t1s.append(far.min(axis=1))
    exit_t = np.zeros(len(origins))
    for _ in range(len(t0s)):
        for t0, t1 in zip(t0s, t1s):
            grow = (t0 <= exit_t + eps) & (t1 > exit_t) & (t0 <= t1)
            exit_t = np.where(grow, t1, exit_t)
    return np.where(exit_t > eps, exit_t, np.nan)


def _rects_normal(points, axis, sign, coord, lo, hi):
    """Outward normal of the nearest of a set of axis-aligned rectangles (the coarse boundary faces)."""
    d2 = np.zeros((len(points), len(axis)))
    for q in range(len(axis)):
        k = axis[q]
        gap = np.maximum(np.maximum(lo[q] - points, points - hi[q]), 0.0)
        gap[:, k] = points[:, k] - coord[q]
        d2[:, q] = np.einsum("ij,ij->i", gap, gap)
    q = np.argmin(d2, axis=1)
    out = np.zeros((len(points), 3))
    out[np.arange(len(points)), axis[q]] = sign[q]
    return out


def _polycube_kernels(breaks, occupancy, scale):
    """Chord and normal kernels for a union of grid cells, from the coarse cells and faces."""
    idx = np.argwhere(occupancy)
    lo = np.column_stack([breaks[k][idx[:, k]] for k in range(3)])
    hi = np.column_stack([breaks[k][idx[:, k] + 1] for k in range(3)])
    chord = functools.partial(_boxes_chord, lo=lo, hi=hi, eps=1e-9 * scale)
    axis, sign, plane, a, b = _polycube_faces(*breaks, occupancy)
    rlo = np.zeros((len(axis), 3))
    rhi = np.zeros((len(axis), 3))
    coord = np.zeros(len(axis))
    for q in range(len(axis)):  # a handful of coarse faces
        k, i, j = axis[q], (axis[q] + 1) % 3, (axis[q] + 2) % 3
        coord[q] = breaks[k][plane[q]]
        rlo[q, k] = rhi[q, k] = coord[q]
        rlo[q, i], rhi[q, i] = breaks[i][a[q]], breaks[i][a[q] + 1]
        rlo[q, j], rhi[q, j] = breaks[j][b[q]], breaks[j][b[q] + 1]
    normal = functools.partial(_rects_normal, axis=axis, sign=sign.astype(np.float64), coord=coord,
                               lo=rlo, hi=rhi)
    return chord, normal


# --------------------------------------------------------------------------------------------------
# The shapes
# --------------------------------------------------------------------------------------------------


def _material(name, rgb):
    return trimesh.visual.material.PBRMaterial(
        name=name, baseColorFactor=[*rgb, 255], metallicFactor=0.0, roughnessFactor=0.8)


def _make_shape(name, surface, params, resolution, volume_exact, area_exact, sources, chord, normal,
                rgb=(200, 200, 200)):
    mesh = assemble_mesh(surface, material=_material(name, rgb))
    mesh.metadata["name"] = name
    volume_mesh = float(mesh.volume)
    area_mesh = float(mesh.area)
    return Shape(
        name=name,
        mesh=mesh,
        params={k: float(v) for k, v in params.items()},
        resolution=dict(resolution),
        volume_exact=float(volume_exact),
        area_exact=float(area_exact),
        volume_mesh=volume_mesh,
        area_mesh=area_mesh,
        cauchy_mean_chord=4.0 * volume_mesh / area_mesh,
        facet_error=float(surface.facet_error),
        sources=dict(sources),
        chord_kernel=chord,
        normal_kernel=normal,
    )


def sphere(radius: float = 1.0, *, segments: int = 96, band_islands: int = 2) -> Shape:
    """A solid sphere about the origin (UV sphere: band strip + two polar caps).

    Parameters
    ----------
    radius : float
        Scene units.
    segments : int
        Longitude segments (multiple of 6); the latitude step is the same angle.
    band_islands : int
        Islands the equatorial band is cut into.

    Returns
    -------
    Shape

    Examples
    --------
    >>> s = sphere(radius=1.0, segments=24)
    >>> round(s.volume_exact, 6)
    4.18879
    """
    radius = _positive(radius, "radius")
    surf = sphere_surface(radius, segments, band_islands=band_islands)
    sources = {
        "volume_exact": "V = 4/3*pi*R^3 (Archimedes, On the Sphere and Cylinder)",
        "area_exact": "S = 4*pi*R^2 (Archimedes, On the Sphere and Cylinder)",
        "cauchy_mean_chord": _CAUCHY_SOURCE + "; ideal sphere 4R/3",
        "normal_chord": "sphere: chord at angle theta from the inward normal is 2R*cos(theta) (elementary "
                        "geometry); theta = 0 gives 2R. Computed as the far root of the ray-sphere quadratic.",
        "facet_error": _REVOLVE_FACET + "; here 2R*(1 - cos(pi/segments))",
    }
    centers, radii = np.zeros((1, 3)), np.array([radius])
    return _make_shape(
        "sphere", surf, {"radius": radius}, {"segments": segments, "band_islands": band_islands},
        4.0 / 3.0 * math.pi * radius**3, 4.0 * math.pi * radius**2, sources,
        functools.partial(_spheres_chord, centers=centers, radii=radii),
        functools.partial(_spheres_normal, centers=centers, radii=radii, signs=[1.0]),
        rgb=(205, 190, 170))


def torus(major_radius: float = 1.0, minor_radius: float = 0.3, *, major_segments: int = 96,
          minor_segments: int = 32) -> Shape:
    """A solid ring torus about +z.

    UV layout: the (u, v) rectangle cut into four islands -- outer and inner half of the tube, each
    split into two half-turns around the axis.

    Parameters
    ----------
    major_radius : float
        Distance from the axis to the tube centre, R.
    minor_radius : float
        Tube radius r < R.
    major_segments : int
        Segments around the axis (even).  Defaults give 6144 faces.
    minor_segments : int
        Segments around the tube (even).

    Returns
    -------
    Shape
    """
    big, small = _positives(major_radius=major_radius, minor_radius=minor_radius)
    _check_smaller("minor_radius", small, "major_radius", big)
    major_segments = _positive_int(major_segments, "major_segments")
    minor_segments = _positive_int(minor_segments, "minor_segments")
    if major_segments % 2 or minor_segments % 2:
        raise ValueError("major_segments and minor_segments must be even")
    h = minor_segments // 2
    pieces = [
        arc_piece((big, 0.0), small, -np.pi / 2, np.pi / 2, h, "outer", splits=2),
        arc_piece((big, 0.0), small, np.pi / 2, 3 * np.pi / 2, h, "inner", splits=2),
    ]
    surf = revolve(pieces, major_segments, closed=True)
    sources = {
        "volume_exact": "V = 2*pi^2*R*r^2 (Pappus's centroid theorem: tube disc area pi*r^2 swept at radius R)",
        "area_exact": "S = 4*pi^2*R*r (Pappus's centroid theorem: tube circumference 2*pi*r swept at radius R)",
        "cauchy_mean_chord": _CAUCHY_SOURCE + _CAUCHY_NONCONVEX + "; ideal torus 2r",
        "normal_chord": "torus: 2r at every point -- the normal lies in the meridian plane and passes through "
                        "the tube centre, so the inward ray crosses the tube along a diameter. Computed as the "
                        "next real root of the ray-torus quartic (|x|^2 + R^2 - r^2)^2 = 4R^2(x^2 + y^2).",
        "facet_error": _REVOLVE_FACET + "; here (R + r)(1 - cos(pi/major_segments)) + r(1 - cos(pi/minor_segments))",
    }
    return _make_shape(
        "torus", surf, {"major_radius": big, "minor_radius": small},
        {"major_segments": major_segments, "minor_segments": minor_segments},
        2.0 * math.pi**2 * big * small**2, 4.0 * math.pi**2 * big * small, sources,
        functools.partial(_torus_chord, major=big, minor=small),
        functools.partial(_torus_normal, major=big), rgb=(190, 205, 170))


def box(size=(1.0, 0.7, 0.4), *, max_edge: float | None = None) -> Shape:
    """A solid box centred at the origin, one UV island per face.

    Parameters
    ----------
    size : (3,) float
        Edge lengths along x, y, z.
    max_edge : float, optional
        Subdivide each face into a grid with edges no longer than this; None keeps 2 triangles per face
        (12 faces, 24 vertices).

    Returns
    -------
    Shape
    """
    if np.shape(size) != (3,):
        raise ValueError(f"size must be three edge lengths (x, y, z), got {size!r}")
    a, b, c = (_positive(s, "size") for s in size)
    half = np.array([a, b, c]) / 2.0
    breaks = [np.array([-h, h]) for h in half]
    occ = np.ones((1, 1, 1), dtype=bool)
    surf = _refined_polycube(breaks, occ, max_edge)
    chord, normal = _polycube_kernels(breaks, occ, float(max(a, b, c)))
    sources = {
        "volume_exact": "V = a*b*c (elementary)",
        "area_exact": "S = 2(ab + bc + ca) (elementary)",
        "cauchy_mean_chord": _CAUCHY_SOURCE + "; ideal box 2abc/(ab + bc + ca)",
        "normal_chord": "box: the extent across the face the point is on (a, b or c); computed by the slab "
                        "test (Kay & Kajiya 1986, from memory), exact for any direction",
        "facet_error": "0: the faces are the ideal surface",
    }
    return _make_shape(
        "box", surf, {"size_x": a, "size_y": b, "size_z": c},
        {"max_edge": max_edge},
        a * b * c, 2.0 * (a * b + b * c + c * a), sources, chord, normal, rgb=(170, 190, 205))


def capped_cylinder(radius: float = 0.5, height: float = 1.2, *, segments: int = 64,
                    side_rows: int | None = None, cap_rings: int | None = None, side_islands: int = 2) -> Shape:
    """A solid cylinder about +z, z in [-h/2, h/2]: side strip islands plus two cap disk islands.

    Parameters
    ----------
    radius, height : float
        Scene units.
    segments : int
        Segments around the axis.
    side_rows, cap_rings : int, optional
        Rows on the side and rings on each cap; by default chosen so the quads are roughly square
        (defaults give 5888 faces).
    side_islands : int
        Islands the side strip is cut into around the axis.

    Returns
    -------
    Shape
    """
    r, h = _positives(radius=radius, height=height)
    segments = _positive_int(segments, "segments")
    step = 2.0 * math.pi * r / segments
    side_rows = _positive_int(side_rows if side_rows is not None else math.ceil(h / step), "side_rows")
    cap_rings = _positive_int(cap_rings if cap_rings is not None else math.ceil(r / step), "cap_rings")
    pieces = [
        line_piece((0.0, -h / 2), (r, -h / 2), cap_rings, "bottom"),
        line_piece((r, -h / 2), (r, h / 2), side_rows, "side", splits=_positive_int(side_islands, "side_islands")),
        line_piece((r, h / 2), (0.0, h / 2), cap_rings, "top"),
    ]
    surf = revolve(pieces, segments)
    sources = {
        "volume_exact": "V = pi*r^2*h (elementary)",
        "area_exact": "S = 2*pi*r*h + 2*pi*r^2 (elementary)",
        "cauchy_mean_chord": _CAUCHY_SOURCE + "; ideal cylinder 2rh/(r + h)",
        "normal_chord": "capped cylinder: 2r from the side (the radial ray crosses a diameter), h from a cap; "
                        "computed as the exit from the convex solid (far root of the side, slab for the caps)",
        "facet_error": _REVOLVE_FACET + "; here r(1 - cos(pi/segments)) (flat profile, sag 0)",
    }
    return _make_shape(
        "capped_cylinder", surf, {"radius": r, "height": h},
        {"segments": segments, "side_rows": side_rows, "cap_rings": cap_rings, "side_islands": side_islands},
        math.pi * r * r * h, 2.0 * math.pi * r * h + 2.0 * math.pi * r * r, sources,
        functools.partial(_cylinder_chord, radius=r, half_height=h / 2),
        functools.partial(_cylinder_normal, radius=r, half_height=h / 2), rgb=(205, 170, 190))


def hollow_shell(outer_radius: float = 1.0, inner_radius: float = 0.8, *, segments: int = 72) -> Shape:
    """The solid between two concentric spheres; the inner wall faces the cavity.

    Parameters
    ----------
    outer_radius, inner_radius : float
        Scene units, ``inner_radius < outer_radius``.
    segments : int
        Longitude segments of each sphere (multiple of 6).

    Returns
    -------
    Shape
    """
    ro, ri = _positives(outer_radius=outer_radius, inner_radius=inner_radius)
    _check_smaller("inner_radius", ri, "outer_radius", ro)
    surf = join_surfaces([sphere_surface(ro, segments, label="outer"),
                          sphere_surface(ri, segments, inward=True, label="inner")])
    sources = {
        "volume_exact": "V = 4/3*pi*(r_out^3 - r_in^3) (difference of two balls; Archimedes)",
        "area_exact": "S = 4*pi*(r_out^2 + r_in^2) (both spheres; Archimedes)",
        "cauchy_mean_chord": _CAUCHY_SOURCE + _CAUCHY_NONCONVEX,
        "normal_chord": "hollow shell: r_out - r_in on both surfaces (the radial ray crosses the wall); "
                        "computed as the next root among the two ray-sphere quadratics",
        "facet_error": _REVOLVE_FACET + "; here 2*r_out*(1 - cos(pi/segments)), the larger of the two spheres",
    }
    centers = np.zeros((2, 3))
    radii = np.array([ro, ri])
    return _make_shape(
        "hollow_shell", surf, {"outer_radius": ro, "inner_radius": ri}, {"segments": segments},
        4.0 / 3.0 * math.pi * (ro**3 - ri**3), 4.0 * math.pi * (ro**2 + ri**2), sources,
        functools.partial(_spheres_chord, centers=centers, radii=radii),
        functools.partial(_spheres_normal, centers=centers, radii=radii, signs=[1.0, -1.0]),
        rgb=(170, 205, 200))


def l_block(length: float = 1.0, height: float = 0.8, depth: float = 0.5, *, foot_thickness: float = 0.3,
            wall_thickness: float = 0.25, max_edge: float | None = None) -> Shape:
    """An L-shaped prism (non-convex), bounding box centred at the origin, one UV island per face.

    The L profile in the xy-plane is the union of a foot ``[0, length] x [0, foot_thickness]`` and a
    wall ``[0, wall_thickness] x [0, height]`` (before centring), extruded by ``depth`` along z.

    Parameters
    ----------
    length, height, depth : float
        Bounding box along x, y, z.
    foot_thickness : float
        Height of the foot (< height).
    wall_thickness : float
        Width of the upright wall (< length).
    max_edge : float, optional
        Subdivide faces into grids with edges no longer than this; None gives 28 faces.

    Returns
    -------
    Shape
    """
    a, b, d, t1, t2 = _positives(length=length, height=height, depth=depth, foot_thickness=foot_thickness,
                                 wall_thickness=wall_thickness)
    if t1 >= b or t2 >= a:
        raise ValueError("foot_thickness must be < height and wall_thickness < length")
    breaks = [np.array([0.0, t2, a]) - a / 2, np.array([0.0, t1, b]) - b / 2, np.array([0.0, d]) - d / 2]
    occ = np.array([[[True], [True]], [[True], [False]]])
    surf = _refined_polycube(breaks, occ, max_edge)
    chord, normal = _polycube_kernels(breaks, occ, float(max(a, b, d)))
    profile_area = a * t1 + t2 * (b - t1)
    sources = {
        "volume_exact": "V = depth * (length*foot + wall*(height - foot)) (sum of two boxes)",
        "area_exact": "S = 2 * profile area + 2(length + height) * depth (a rectilinear L has its bounding "
                      "rectangle's perimeter)",
        "cauchy_mean_chord": _CAUCHY_SOURCE + _CAUCHY_NONCONVEX,
        "normal_chord": "L-block: straight-through extent along the face normal, piecewise: depth from the "
                        "two L faces; length from x = 0 and x = length below the foot top, wall from x = 0 and "
                        "the inner wall face above it; height from y = 0 under the wall, foot from y = 0 and the "
                        "foot top beyond it, height from the wall top. Computed exactly by slab intervals of the "
                        "cells chained from the start point (Kay & Kajiya 1986 slab test, from memory)",
        "facet_error": "0: the faces are the ideal surface",
    }
    return _make_shape(
        "l_block", surf,
        {"length": a, "height": b, "depth": d, "foot_thickness": t1, "wall_thickness": t2},
        {"max_edge": max_edge}, d * profile_area, 2.0 * profile_area + 2.0 * (a + b) * d, sources, chord, normal,
        rgb=(205, 200, 170))


def shell_and_ball(shell_radius: float = 1.0, wall_thickness: float = 0.04, ball_radius: float = 0.3, *,
                   gap: float = 0.3, shell_segments: int = 72, ball_segments: int = 36) -> Shape:
    """A thin hollow shell beside a small solid ball: two disjoint closed parts in one mesh.

    The shell is centred at the origin; the ball at ``x = shell_radius + gap + ball_radius``.  Most of
    the area (about 95 % at the defaults) is on the thin shell, whose wall is 4 % of its radius.

    Parameters
    ----------
    shell_radius : float
        Outer radius of the shell.
    wall_thickness : float
        Shell wall, ``< shell_radius``.
    ball_radius : float
        Radius of the solid ball.
    gap : float
        Clearance between the parts.
    shell_segments, ball_segments : int
        Longitude segments (multiples of 6).

    Returns
    -------
    Shape
    """
    ro, w, rb, g = _positives(shell_radius=shell_radius, wall_thickness=wall_thickness, ball_radius=ball_radius,
                              gap=gap)
    _check_smaller("wall_thickness", w, "shell_radius", ro)
    ri = ro - w
    cb = np.array([ro + g + rb, 0.0, 0.0])
    surf = join_surfaces([
        sphere_surface(ro, shell_segments, label="shell-outer"),
        sphere_surface(ri, shell_segments, inward=True, label="shell-inner"),
        sphere_surface(rb, ball_segments, label="ball").transformed(offset=cb),
    ])
    sources = {
        "volume_exact": "V = 4/3*pi*(r_out^3 - r_in^3 + r_ball^3) (sum of the parts; Archimedes)",
        "area_exact": "S = 4*pi*(r_out^2 + r_in^2 + r_ball^2) (sum of the parts; Archimedes)",
        "cauchy_mean_chord": _CAUCHY_SOURCE + _CAUCHY_NONCONVEX,
        "normal_chord": "per point, by the nearest part: r_out - r_in on either shell wall, 2*r_ball on the ball; "
                        "computed as the next root among the three ray-sphere quadratics",
        "facet_error": _REVOLVE_FACET + "; the largest of the three spheres' 2R(1 - cos(pi/segments))",
    }
    centers = np.stack((np.zeros(3), np.zeros(3), cb))
    radii = np.array([ro, ri, rb])
    return _make_shape(
        "shell_and_ball", surf,
        {"shell_radius": ro, "wall_thickness": w, "inner_radius": ri, "ball_radius": rb, "gap": g,
         "ball_center_x": float(cb[0])},
        {"shell_segments": shell_segments, "ball_segments": ball_segments},
        4.0 / 3.0 * math.pi * (ro**3 - ri**3 + rb**3), 4.0 * math.pi * (ro**2 + ri**2 + rb**2), sources,
        functools.partial(_spheres_chord, centers=centers, radii=radii),
        functools.partial(_spheres_normal, centers=centers, radii=radii, signs=[1.0, -1.0, 1.0]),
        rgb=(200, 180, 205))


def analytic_set() -> list[Shape]:
    """The six main analytic shapes at their defaults.

    Returns
    -------
    list of Shape
        sphere, torus, box, capped_cylinder, hollow_shell, l_block.
    """
    return [sphere(), torus(), box(), capped_cylinder(), hollow_shell(), l_block()]


# --------------------------------------------------------------------------------------------------
# Closed forms for a sphere seen through a cone of directions
# --------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class SphereConeForms:
    """The closed forms over a sphere of one lobe's polar density, pdf ∝ cos^p θ on [c, 1].

    Each takes R (scene units) and c = cos α, or τ = 2σR and c, as floats or arrays; the derivations
    are in the docstrings of :func:`sphere_cone_mean_chord`, :func:`sphere_cone_chord_second_moment`
    and :func:`sphere_cone_mean_transmittance`.

    Attributes
    ----------
    cosine_power : int
        p, the :attr:`thickbake.lobes.Lobe.cosine_power` these forms hold for.
    mean_chord : callable (R, c) -> E[l], scene units
    chord_second_moment : callable (R, c) -> E[l²], scene units²
    mean_transmittance : callable (τ, c) -> E[exp(−τ cos θ)], unitless
    """

    cosine_power: int
    mean_chord: Callable
    chord_second_moment: Callable
    mean_transmittance: Callable


def _uniform_transmittance(tau, c):
    span = 1.0 - c
    return np.exp(-tau * c) * _g1(tau * span)


def _cosine_transmittance(tau, c):
    span = 1.0 - c
    return 2.0 * np.exp(-tau * c) * (c * _g1(tau * span) + span * _g2(tau * span)) / (1.0 + c)


#: The sphere closed forms of every lobe, by the power p of its density ∝ cos^p θ: the forms depend
#: on the polar density alone, which is all a lobe's ``cosine_power`` says.  A lobe of another
#: density needs its own entry here before the closed forms (and ``verify``) can check it.
_SPHERE_CONE_FORMS = {
    0: SphereConeForms(  # uniform: cos θ uniform on [c, 1]
        cosine_power=0,
        mean_chord=lambda radius, c: radius * (1.0 + c),
        chord_second_moment=lambda radius, c: 4.0 * radius**2 * (1.0 + c + c * c) / 3.0,
        mean_transmittance=_uniform_transmittance),
    1: SphereConeForms(  # cosine-weighted: cos θ has density 2 cos θ / (1 - c²) on [c, 1]
        cosine_power=1,
        mean_chord=lambda radius, c: 4.0 * radius * (1.0 + c + c * c) / (3.0 * (1.0 + c)),
        chord_second_moment=lambda radius, c: 2.0 * radius**2 * (1.0 + c * c),
        mean_transmittance=_cosine_transmittance),
}


def sphere_cone_forms(lobe) -> SphereConeForms:
    """The closed forms over a sphere for ``lobe`` (a name or a :class:`thickbake.lobes.Lobe`).

    Raises
    ------
    ThickbakeError
        An unknown lobe name (:func:`thickbake.lobes.lobe_named`, as everywhere), or a lobe whose
        density has no closed form here.
    """
    found = lobe_named(lobe)
    forms = _SPHERE_CONE_FORMS.get(found.cosine_power)
    if forms is None:
        raise ThickbakeError(f"lobe {found.name!r} has no closed form over a sphere",
                             fix="check it with the cosine or uniform lobe")
    return forms


def _cone_args(radius, cone_half_angle_rad, lobe):
    """The lobe's forms, R as float64 and cos α, after checking the arguments."""
    forms = sphere_cone_forms(lobe)
    radius = np.asarray(radius, dtype=np.float64)
    alpha = np.asarray(cone_half_angle_rad, dtype=np.float64)
    if np.any(~(radius > 0)):
        raise ValueError(f"radius must be > 0, got {radius}")
    if np.any(~((alpha >= 0) & (alpha <= np.pi / 2))):
        raise ValueError(f"cone_half_angle_rad must be in [0, pi/2], got {alpha}")
    return forms, radius, np.cos(alpha)


def sphere_cone_mean_chord(radius, cone_half_angle_rad, lobe):
    """Mean chord of rays from a point on a sphere within a cone about the inward normal.

    A ray at angle theta from the inward normal travels ``2R cos(theta)`` before leaving the sphere
    (the chord subtends ``pi - 2 theta`` at the centre).  With ``mu = cos(theta)`` and
    ``c = cos(alpha)``, the solid angle is ``dOmega = dmu dphi``, so

    * uniform over the cone's solid angle, mu is uniform on [c, 1]:
      ``E[l] = 2R * (1 + c) / 2 = R (1 + c)``;
    * cosine-weighted, pdf proportional to mu on [c, 1] (normaliser ``(1 - c^2) / 2``):
      ``E[l] = 2R * (1 - c^3)/3 * 2/(1 - c^2) = 4R (1 - c^3) / (3 sin^2 alpha)``, evaluated as
      ``4R (1 + c + c^2) / (3 (1 + c))`` so alpha -> 0 gives 2R without 0/0.

    alpha = pi/2 gives the hemisphere means 4R/3 (cosine) and R (uniform).

    Parameters
    ----------
    radius : float or array_like
        Sphere radius R, scene units.
    cone_half_angle_rad : float or array_like
        Cone half-angle alpha in [0, pi/2].
    lobe : str or thickbake.lobes.Lobe
        "cosine" or "uniform" (or their objects); the forms come from :func:`sphere_cone_forms`.

    Returns
    -------
    float or ndarray
        Mean chord, scene units.

    Examples
    --------
    >>> round(sphere_cone_mean_chord(1.7, 1.0, "cosine"), 12)
    2.696257825099
    """
    forms, radius, c = _cone_args(radius, cone_half_angle_rad, lobe)
    out = forms.mean_chord(radius, c)
    return float(out) if out.ndim == 0 else out


def sphere_cone_chord_second_moment(radius, cone_half_angle_rad, lobe):
    """Second moment E[l^2] of the chord under the same lobes as :func:`sphere_cone_mean_chord`.

    ``E[l^2] = 4R^2 E[mu^2]``: uniform ``4R^2 (1 - c^3) / (3 (1 - c)) = 4R^2 (1 + c + c^2) / 3``; cosine
    ``4R^2 * (1 - c^4)/4 * 2/(1 - c^2) = 2R^2 (1 + c^2)``.  At alpha = pi/2 the cosine value is 2R^2
    (chord density l / (2R^2) on [0, 2R]).  The per-ray variance is ``E[l^2] - E[l]^2`` and the
    Monte-Carlo standard error of an n-ray mean is ``sqrt(variance / n)``.

    Parameters
    ----------
    radius : float or array_like
    cone_half_angle_rad : float or array_like
    lobe : str or thickbake.lobes.Lobe
        "cosine" or "uniform" (or their objects); the forms come from :func:`sphere_cone_forms`.

    Returns
    -------
    float or ndarray
        Scene units squared.
    """
    forms, radius, c = _cone_args(radius, cone_half_angle_rad, lobe)
    out = forms.chord_second_moment(radius, c)
    return float(out) if out.ndim == 0 else out


def _g1(x):
    """(1 - exp(-x)) / x, 1 at x = 0."""
    x = np.asarray(x, np.float64)
    safe = np.where(x == 0, 1.0, x)
    return np.where(x == 0, 1.0, -np.expm1(-safe) / safe)


def _g2(x):
    """(1 - exp(-x)(1 + x)) / x^2, 1/2 at x = 0; Taylor series below 0.1 to avoid cancellation."""
    x = np.asarray(x, np.float64)
    small = x < 0.1
    safe = np.where(small, 1.0, x)
    direct = (-np.expm1(-safe) - safe * np.exp(-safe)) / (safe * safe)
    # sum_k (-1)^k (k + 1) / (k + 2)! x^k; the k = 12 term is below 1e-24 at x = 0.1
    series = np.zeros_like(x)
    for k in range(12, -1, -1):
        series = series * x + (-1) ** k * (k + 1) / math.factorial(k + 2)
    return np.where(small, series, direct)


def sphere_cone_mean_transmittance(radius, cone_half_angle_rad, lobe, sigma):
    """Mean Beer-Lambert transmittance exp(-sigma * 2R cos(theta)) over a cone of inward directions.

    With ``tau = 2 sigma R``, ``c = cos(alpha)``, ``L = 1 - c`` and ``x = tau L``:

    * uniform: ``T = int_c^1 exp(-tau mu) dmu / (1 - c) = exp(-tau c) * g1(x)``,
      ``g1(x) = (1 - e^-x) / x``;
    * cosine: ``T = 2 int_c^1 mu exp(-tau mu) dmu / (1 - c^2)``.  Substituting ``mu = c + w``,
      ``int_0^L (c + w) e^(-tau (c + w)) dw = e^(-tau c) (c L g1(x) + L^2 g2(x))`` with
      ``g2(x) = (1 - e^-x (1 + x)) / x^2``, so ``T = 2 e^(-tau c) (c g1(x) + L g2(x)) / (1 + c)``.

    At alpha = pi/2 (c = 0) these reduce to ``(1 - e^-tau) / tau`` and
    ``2 [1 - (1 + tau) e^-tau] / tau^2``.  alpha -> 0 gives ``e^-tau``, sigma -> 0 gives 1; g1 and g2
    are evaluated without cancellation, so neither limit divides by zero.  The second moment of the
    transmittance is this function at ``2 sigma`` (``T^2 = exp(-2 sigma l)``).

    Parameters
    ----------
    radius, cone_half_angle_rad, lobe
        As for :func:`sphere_cone_mean_chord`.
    sigma : float or array_like
        Extinction coefficient >= 0, per scene unit.

    Returns
    -------
    float or ndarray
        Mean transmittance in [0, 1].

    Examples
    --------
    >>> round(sphere_cone_mean_transmittance(1.7, math.pi / 2, "uniform", 1.0), 12)
    0.284301979423
    """
    forms, radius, c = _cone_args(radius, cone_half_angle_rad, lobe)
    sigma = np.asarray(sigma, dtype=np.float64)
    if np.any(~(sigma >= 0)):
        raise ValueError(f"sigma must be >= 0, got {sigma}")
    out = forms.mean_transmittance(2.0 * sigma * radius, c)
    return float(out) if out.ndim == 0 else out


# --------------------------------------------------------------------------------------------------
# Files
# --------------------------------------------------------------------------------------------------


def shape_record(shape: Shape) -> dict:
    """The JSON-ready summary of a shape written to ``expected.json``."""
    return {
        "name": shape.name,
        "files": {"obj": f"{shape.name}.obj", "glb": f"{shape.name}.glb"},
        "params": shape.params,
        "resolution": shape.resolution,
        "n_vertices": int(len(shape.mesh.vertices)),
        "n_faces": int(len(shape.mesh.faces)),
        "n_uv_islands": int(uv_islands(shape.mesh).max() + 1),
        "volume_exact": shape.volume_exact,
        "area_exact": shape.area_exact,
        "volume_mesh": shape.volume_mesh,
        "area_mesh": shape.area_mesh,
        "cauchy_mean_chord": shape.cauchy_mean_chord,
        "cauchy_mean_chord_exact": shape.cauchy_mean_chord_exact,
        "facet_error": shape.facet_error,
        "normal_chord": shape.sources.get("normal_chord"),
        "sources": shape.sources,
    }


def write_shape_set(outdir, shapes: Sequence[Shape] | None = None) -> list[Path]:
    """Write each shape as ``NAME.obj`` and ``NAME.glb`` plus ``expected.json``, atomically.

    Parameters
    ----------
    outdir : str or os.PathLike
        Created if missing.
    shapes : sequence of Shape, optional
        Defaults to :func:`analytic_set`.

    Returns
    -------
    list of pathlib.Path
        The files written, ``expected.json`` last.
    """
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    shapes = analytic_set() if shapes is None else list(shapes)
    written = []
    records = {}
    for s in shapes:
        comment = f"thickbake analytic shape '{s.name}', params {json.dumps(s.params, sort_keys=True)}"
        written.append(atomic_write_bytes(outdir / f"{s.name}.obj", obj_bytes(s.mesh, comment=comment)))
        written.append(atomic_write_bytes(outdir / f"{s.name}.glb", glb_bytes(s.mesh, s.name)))
        records[s.name] = shape_record(s)
    doc = {
        "description": "Closed forms for the thickbake analytic shapes (lengths in scene units).",
        "uv_convention": "OBJ: v up; the GLB stores 1 - v per glTF and trimesh flips it back on load",
        "shapes": records,
    }
    text = json.dumps(doc, indent=2, sort_keys=True) + "\n"
    written.append(atomic_write_bytes(outdir / "expected.json", text.encode()))
    return written


# --------------------------------------------------------------------------------------------------
# Argument checks
# --------------------------------------------------------------------------------------------------


def _positive(value, name) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise TypeError(f"{name} must be a number, got {value!r}") from None
    if not (v > 0 and math.isfinite(v)):
        raise ValueError(f"{name} must be a positive finite number, got {value!r}")
    return v


def _positives(**values) -> tuple[float, ...]:
    """:func:`_positive` applied to each keyword argument in the order given; the values as a tuple."""
    return tuple(_positive(value, name) for name, value in values.items())


def _check_smaller(small_name, small: float, big_name, big: float) -> None:
    """Raise unless ``small < big`` (e.g. a tube radius against the ring radius)."""
    if small >= big:
        raise ValueError(f"{small_name} must be smaller than {big_name}, got {small} >= {big}")
