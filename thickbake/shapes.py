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
  surface.  For surfaces of revolution it is derived in :func:`revolve`; planar solids have 0.

Building blocks (also used by ``scripts/make_samples.py``): :class:`ProfilePiece`, :func:`line_piece`,
:func:`arc_piece`, :func:`revolve`, :func:`sphere_surface`, :func:`polycube_surface`, :class:`Surface`,
:func:`join_surfaces`, :func:`pack_islands`, :func:`assemble_mesh`, :func:`obj_bytes`, :func:`glb_bytes`,
:func:`atomic_write_bytes`.

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
import os
import secrets
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Sequence

import numpy as np
import trimesh

__all__ = [
    "Shape",
    "Surface",
    "ProfilePiece",
    "UV_MARGIN",
    "line_piece",
    "arc_piece",
    "revolve",
    "sphere_surface",
    "polycube_surface",
    "join_surfaces",
    "pack_islands",
    "assemble_mesh",
    "uv_islands",
    "sphere",
    "torus",
    "box",
    "capped_cylinder",
    "hollow_shell",
    "l_block",
    "shell_and_ball",
    "analytic_set",
    "write_shape_set",
    "shape_record",
    "sphere_cone_mean_chord",
    "sphere_cone_chord_second_moment",
    "sphere_cone_mean_transmittance",
    "obj_bytes",
    "glb_bytes",
    "atomic_write_bytes",
]

#: Gap between packed UV islands, as a fraction of the unit square (half of it at the border).  1/32 is
#: 8 texels at 256 px and 32 at 1024 px, room for edge padding on both sides of a seam.
UV_MARGIN = 1.0 / 32.0

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
# Surfaces before packing
# --------------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Surface:
    """A welded triangle surface with per-corner normals and island-local UVs, before packing.

    Attributes
    ----------
    positions : (m, 3) float64
        Welded vertex positions (each position stored once, so seams close exactly).
    faces : (f, 3) int64
        Outward-wound triangles into ``positions``.
    corner_normals : (f, 3, 3) float64
        Outward unit normal at each face corner (differs across hard edges).
    corner_uv : (f, 3, 2) float64
        Island-local UVs in world units (area-faithful to within the layout's distortion).
    face_island : (f,) int64
        Island label of each face.
    facet_error : float
        Bound on the distance from the ideal surface, scene units.
    """

    positions: np.ndarray
    faces: np.ndarray
    corner_normals: np.ndarray
    corner_uv: np.ndarray
    face_island: np.ndarray
    facet_error: float = 0.0

    def transformed(self, matrix=None, offset=(0.0, 0.0, 0.0)) -> "Surface":
        """Apply ``x -> matrix @ x + offset`` (normals by the inverse transpose).

        Parameters
        ----------
        matrix : (3, 3) float64, optional
            Linear part with positive determinant (keeps the winding outward); identity if None.
        offset : (3,) float64
            Translation, scene units.

        Returns
        -------
        Surface
            ``facet_error`` is scaled by the largest singular value of ``matrix``.
        """
        m = np.eye(3) if matrix is None else np.asarray(matrix, dtype=np.float64)
        if np.linalg.det(m) <= 0:
            raise ValueError("matrix must have a positive determinant to keep faces outward-wound")
        normals = self.corner_normals @ np.linalg.inv(m)
        normals /= np.linalg.norm(normals, axis=-1, keepdims=True)
        return Surface(
            positions=self.positions @ m.T + np.asarray(offset, dtype=np.float64),
            faces=self.faces,
            corner_normals=normals,
            corner_uv=self.corner_uv,
            face_island=self.face_island,
            facet_error=self.facet_error * float(np.linalg.norm(m, 2)),
        )


def join_surfaces(surfaces: Sequence[Surface]) -> Surface:
    """Concatenate surfaces into one (disjoint parts, islands kept apart).

    Parameters
    ----------
    surfaces : sequence of Surface

    Returns
    -------
    Surface
        ``facet_error`` is the largest of the parts'.
    """
    positions, faces, normals, uvs, islands = [], [], [], [], []
    vertex_base = 0
    island_base = 0
    for s in surfaces:
        positions.append(s.positions)
        faces.append(s.faces + vertex_base)
        normals.append(s.corner_normals)
        uvs.append(s.corner_uv)
        islands.append(s.face_island + island_base)
        vertex_base += len(s.positions)
        island_base += int(s.face_island.max()) + 1
    return Surface(
        positions=np.concatenate(positions),
        faces=np.concatenate(faces),
        corner_normals=np.concatenate(normals),
        corner_uv=np.concatenate(uvs),
        face_island=np.concatenate(islands),
        facet_error=max(s.facet_error for s in surfaces),
    )


# --------------------------------------------------------------------------------------------------
# Surfaces of revolution
# --------------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class ProfilePiece:
    """One smooth piece of a meridian profile in the (rho, z) half-plane.

    The profile is walked so that the solid lies to its left (counter-clockwise around the solid's
    cross-section): bottom pole outwards, up the outside, back in along the top.  The outward normal is
    then the tangent turned clockwise, ``(t_z, -t_rho)``.

    Attributes
    ----------
    rho, z : (m + 1,) float64
        Sample points; ``rho >= 0``.  ``rho == 0`` only at a profile end (a pole).
    normal : (m + 1, 2) float64
        Outward unit normal ``(n_rho, n_z)`` of the ideal piece at each sample.
    island : str
        UV island label; consecutive pieces with the same label form one island.
    sag : float
        Hausdorff distance between the ideal curve of this piece and its polyline, scene units.
    splits : int
        Number of islands the revolved strip is cut into along the angle (strips only).
    """

    rho: np.ndarray
    z: np.ndarray
    normal: np.ndarray
    island: str
    sag: float
    splits: int = 1

    def reversed(self) -> "ProfilePiece":
        """The same piece walked backwards: normals flip (the solid is now on the other side)."""
        return ProfilePiece(self.rho[::-1], self.z[::-1], -self.normal[::-1], self.island, self.sag, self.splits)


def line_piece(start, end, steps: int, island: str, splits: int = 1) -> ProfilePiece:
    """A straight profile piece from ``start`` to ``end`` in (rho, z), ``steps`` segments, sag 0.

    Examples
    --------
    >>> line_piece((0.0, 0.0), (1.0, 0.0), 4, "bottom").normal[0].tolist()
    [0.0, -1.0]
    """
    steps = _positive_int(steps, "steps")
    p0 = np.asarray(start, dtype=np.float64)
    p1 = np.asarray(end, dtype=np.float64)
    t = np.linspace(0.0, 1.0, steps + 1)
    pts = p0 + t[:, None] * (p1 - p0)
    pts[-1] = p1
    d = p1 - p0
    n = np.array([d[1], -d[0]]) / np.hypot(*d)
    return ProfilePiece(pts[:, 0], pts[:, 1], np.tile(n, (steps + 1, 1)) + 0.0, island, 0.0, splits)


def arc_piece(center, radius: float, angle_start: float, angle_end: float, steps: int, island: str,
              splits: int = 1) -> ProfilePiece:
    """A circular-arc profile piece ``(rho, z) = center + radius * (cos t, sin t)``.

    Walking with increasing ``t`` the outward normal is ``+(cos t, sin t)`` (solid inside the circle);
    with decreasing ``t`` it is ``-(cos t, sin t)`` (solid outside, e.g. a bowl).  The sag of a chord
    spanning ``dt`` is ``radius * (1 - cos(dt / 2))``.
    """
    steps = _positive_int(steps, "steps")
    t = np.linspace(angle_start, angle_end, steps + 1)
    direction = 1.0 if angle_end > angle_start else -1.0
    c = np.asarray(center, dtype=np.float64)
    rho = c[0] + radius * np.cos(t)
    z = c[1] + radius * np.sin(t)
    normal = direction * np.column_stack((np.cos(t), np.sin(t)))
    sag = radius * (1.0 - math.cos(abs(angle_end - angle_start) / steps / 2.0))
    return ProfilePiece(rho, z, normal, island, sag, splits)


def revolve(pieces: Sequence[ProfilePiece], segments: int, *, closed: bool = False) -> Surface:
    """Revolve a meridian profile about +z into a UV-mapped surface.

    Rings of ``segments`` vertices at ``phi = 2*pi*i/segments``; a profile end on the axis becomes one
    pole vertex with a triangle fan (no zero-area triangles).  Between two rings every quad is a planar
    isosceles trapezoid, split into two triangles.

    UV islands: a run of consecutive pieces with one label that touches a pole is a disk island,
    ``s * (cos phi, sin phi)`` with ``s`` the polyline arc length from the pole (an azimuthal
    equidistant map); any other run is a strip, ``(rho_ref * phi, s)`` with ``rho_ref`` the run's
    largest radius, cut at ``phi = 0`` and into ``splits`` islands along ``phi``.

    Facet error.  Let P be the polyline through the profile samples and C the surface obtained by
    revolving it.  A planar trapezoid (or fan triangle) is the union of the chords joining points at
    equal fraction along its two slanted edges; each chord joins two points of one circle of C of
    radius ``rho <= rho_max`` that are ``2*pi/n`` apart, so every mesh point is within
    ``rho_max * (1 - cos(pi/n))`` of C along the radius, and vice versa.  Every point of C is within the
    piece's ``sag`` of the ideal surface (revolve the curve-to-polyline distance).  By the triangle
    inequality the Hausdorff distance is at most ``max_segments(rho_max * (1 - cos(pi/n)) + sag)``.

    Parameters
    ----------
    pieces : sequence of ProfilePiece
        Consecutive pieces; each starts where the previous one ends.
    segments : int
        Vertices per ring (>= 3).
    closed : bool
        The profile is a closed loop (e.g. a torus tube); the last point must equal the first.

    Returns
    -------
    Surface
    """
    n = _positive_int(segments, "segments")
    if n < 3:
        raise ValueError(f"segments must be at least 3, got {n}")
    pieces = list(pieces)
    rho_parts = [pieces[0].rho.astype(np.float64)]
    z_parts = [pieces[0].z.astype(np.float64)]
    seg_piece, seg_local = [], []
    for k, p in enumerate(pieces):
        if k > 0:
            end = np.array([rho_parts[-1][-1], z_parts[-1][-1]])
            if not np.allclose(end, [p.rho[0], p.z[0]], rtol=0, atol=1e-12 * (1 + np.abs(end).max())):
                raise ValueError(f"profile piece {k} does not start where piece {k - 1} ends")
            rho_parts.append(p.rho[1:])
            z_parts.append(p.z[1:])
        m = len(p.rho) - 1
        seg_piece.append(np.full(m, k))
        seg_local.append(np.arange(m))
    rho = np.concatenate(rho_parts)  # (S + 1,) unwrapped profile points
    z = np.concatenate(z_parts)
    seg_piece = np.concatenate(seg_piece)
    seg_local = np.concatenate(seg_local)
    n_seg = len(seg_piece)
    scale = float(np.abs(np.concatenate((rho, z))).max())
    rho[np.abs(rho) <= 1e-12 * scale] = 0.0
    if np.any(rho < 0):
        raise ValueError("profile must stay at rho >= 0")
    if closed:
        if not np.allclose([rho[-1], z[-1]], [rho[0], z[0]], rtol=0, atol=1e-12 * scale):
            raise ValueError("closed profile must end where it starts")
        if pieces[0].island == pieces[-1].island:
            raise ValueError("closed profile: first and last pieces need different island labels")
        rho[-1], z[-1] = rho[0], z[0]
        n_pts = n_seg
    else:
        n_pts = n_seg + 1
    wrap = np.arange(n_seg + 1) % n_pts  # unwrapped point index -> stored point index
    pole = rho[:n_pts] == 0.0
    if np.any(pole[1:-1]) or (closed and np.any(pole)):
        raise ValueError("only the two ends of an open profile may lie on the axis")

    # welded positions: one vertex per pole, n per ring
    count = np.where(pole, 1, n)
    offset = np.cumsum(count) - count
    cos_t = np.cos(2.0 * np.pi * np.arange(n) / n)
    sin_t = np.sin(2.0 * np.pi * np.arange(n) / n)
    pt = np.repeat(np.arange(n_pts), count)
    col = np.arange(int(count.sum())) - offset[pt]
    positions = np.column_stack((rho[pt] * cos_t[col], rho[pt] * sin_t[col], z[pt])) + 0.0

    # triangles: corners as (unwrapped point, unwrapped column)
    jj, ii = np.meshgrid(np.arange(n_seg), np.arange(n), indexing="ij")
    jj, ii = jj.ravel(), ii.ravel()
    cj = np.stack((np.stack((jj, jj, jj + 1), 1), np.stack((jj, jj + 1, jj + 1), 1)), 1)  # (q, 2, 3)
    ci = np.stack((np.stack((ii, ii + 1, ii + 1), 1), np.stack((ii, ii + 1, ii), 1)), 1)
    keep = np.stack((~pole[wrap[jj]], ~pole[wrap[jj + 1]]), 1)  # tri 1 degenerates at a start pole
    cj, ci = cj[keep], ci[keep]  # (f, 3)
    fj = np.broadcast_to(jj[:, None], keep.shape)[keep]
    fi = np.broadcast_to(ii[:, None], keep.shape)[keep]
    pw = wrap[cj]
    faces = offset[pw] + np.where(pole[pw], 0, ci % n)

    # normals: each face takes its own piece's normal at the corner (hard edges between pieces)
    table = np.concatenate([p.normal for p in pieces]).astype(np.float64)
    piece_start = np.cumsum([0] + [len(p.rho) for p in pieces[:-1]])
    global_start = np.cumsum([0] + [len(p.rho) - 1 for p in pieces[:-1]])
    table_point = np.concatenate([g + np.arange(len(p.rho)) for g, p in zip(global_start, pieces)])
    at_pole = pole[wrap[table_point]]
    table[at_pole] = np.column_stack((np.zeros(at_pole.sum()), np.sign(table[at_pole, 1])))
    k = seg_piece[fj]
    local = seg_local[fj][:, None] + (cj - fj[:, None])
    nrm = table[piece_start[k][:, None] + local]  # (f, 3, 2)
    cc, ss = cos_t[ci % n], sin_t[ci % n]
    corner_normals = np.stack((nrm[..., 0] * cc, nrm[..., 0] * ss, nrm[..., 1]), -1) + 0.0

    # islands and UVs
    labels = [p.island for p in pieces]
    run_of_piece = np.cumsum([0] + [int(labels[i] != labels[i - 1]) for i in range(1, len(pieces))])
    n_runs = int(run_of_piece[-1]) + 1
    run_of_seg = run_of_piece[seg_piece]
    run_first = np.array([np.flatnonzero(run_of_seg == r)[0] for r in range(n_runs)])
    run_last = np.array([np.flatnonzero(run_of_seg == r)[-1] + 1 for r in range(n_runs)])
    run_splits = np.array([pieces[int(np.flatnonzero(run_of_piece == r)[0])].splits for r in range(n_runs)])
    start_pole = pole[wrap[run_first]]
    end_pole = pole[wrap[run_last]]
    disk = start_pole | end_pole
    if np.any(disk & (run_splits != 1)):
        raise ValueError("a disk island (touching a pole) cannot be split")
    s_cum = np.concatenate(([0.0], np.cumsum(np.hypot(np.diff(rho), np.diff(z)))))
    rho_ref = np.array([rho[run_first[r]:run_last[r] + 1].max() for r in range(n_runs)])
    r = run_of_seg[fj][:, None]
    s = np.where(end_pole[r], s_cum[run_last[r]] - s_cum[cj], s_cum[cj] - s_cum[run_first[r]])
    phi = 2.0 * np.pi * ci / n
    u = np.where(disk[r], s * cc, rho_ref[r] * phi)
    v = np.where(disk[r], s * ss, s)
    corner_uv = np.stack((u, v), -1) + 0.0
    run_base = np.cumsum(np.concatenate(([0], run_splits[:-1])))
    rf = run_of_seg[fj]
    face_island = run_base[rf] + (fi * run_splits[rf]) // n

    sag = np.array([p.sag for p in pieces])[seg_piece]
    rho_max = np.maximum(rho[:-1], rho[1:])
    facet_error = float(np.max(rho_max * (1.0 - math.cos(math.pi / n)) + sag))
    return Surface(positions, faces.astype(np.int64), corner_normals, corner_uv,
                   face_island.astype(np.int64), facet_error)


def sphere_surface(radius: float, segments: int, *, inward: bool = False, band_islands: int = 2,
                   label: str = "sphere") -> Surface:
    """A UV sphere about the origin: an equatorial band strip plus two polar-cap disk islands.

    Latitude step equals the longitude step ``2*pi/segments``.  The band covers latitudes within 30 deg
    of the equator, mapped ``(R*lon, R*lat)`` (area distortion up to 1/cos 30 deg = 1.15); each cap is
    an azimuthal equidistant disk of angular radius 60 deg (distortion up to (pi/3)/sin(pi/3) = 1.21).
    Two caps side by side and the two band halves stacked fill a square, so they pack well.  No seam
    reaches a pole, so each pole is a single vertex with a triangle fan.

    Parameters
    ----------
    radius : float
        Scene units.
    segments : int
        Longitude segments; a multiple of 6 (whole latitude rows in caps and band) and of
        ``band_islands``.
    inward : bool
        Wind the faces and normals towards the centre (the inner wall of a hollow shell).
    band_islands : int
        Number of islands the band is cut into along the longitude.
    label : str
        Prefix of the island labels.

    Returns
    -------
    Surface
        With ``facet_error = 2 * radius * (1 - cos(pi / segments))`` (see :func:`revolve`).
    """
    segments = _positive_int(segments, "segments")
    if segments % 6 or segments % band_islands:
        raise ValueError(f"segments must be a multiple of 6 and of band_islands={band_islands}, got {segments}")
    q = segments // 6  # latitude rows per cap and in the band: n_lat = segments / 2 = 3q
    pieces = [
        arc_piece((0.0, 0.0), radius, -np.pi / 2, -np.pi / 6, q, f"{label}-south"),
        arc_piece((0.0, 0.0), radius, -np.pi / 6, np.pi / 6, q, f"{label}-band", splits=band_islands),
        arc_piece((0.0, 0.0), radius, np.pi / 6, np.pi / 2, q, f"{label}-north"),
    ]
    if inward:
        pieces = [p.reversed() for p in reversed(pieces)]
    return revolve(pieces, segments)


# --------------------------------------------------------------------------------------------------
# Orthogonal polyhedra (unions of grid cells)
# --------------------------------------------------------------------------------------------------


def _polycube_faces(xs, ys, zs, occupancy):
    """Boundary cell faces of an occupancy grid: (axis, sign, plane, a, b) arrays, one entry per quad."""
    axis, sign, plane, ia, ib = [], [], [], [], []
    for k in range(3):
        i, j = (k + 1) % 3, (k + 2) % 3
        occ = np.transpose(occupancy, (k, i, j))
        padded = np.pad(occ, ((1, 1), (0, 0), (0, 0)), constant_values=False)
        below, above = padded[:-1], padded[1:]
        for sgn, mask in ((1, below & ~above), (-1, ~below & above)):
            p, a, b = np.nonzero(mask)
            axis.append(np.full(len(p), k))
            sign.append(np.full(len(p), sgn))
            plane.append(p)
            ia.append(a)
            ib.append(b)
    return tuple(np.concatenate(x) for x in (axis, sign, plane, ia, ib))


def polycube_surface(xs, ys, zs, occupancy) -> Surface:
    """The boundary of a union of rectilinear grid cells, one UV island per face plane.

    Parameters
    ----------
    xs, ys, zs : (nx + 1,), (ny + 1,), (nz + 1,) float64
        Increasing grid breakpoints, scene units.
    occupancy : (nx, ny, nz) bool
        Which cells are solid.

    Returns
    -------
    Surface
        Quads between cell faces (two triangles each) wound outward, flat normals, planar-projection
        UVs; ``facet_error`` 0 (the faces are the ideal surface).
    """
    grid = [np.asarray(g, dtype=np.float64) for g in (xs, ys, zs)]
    occupancy = np.asarray(occupancy, dtype=bool)
    dims = np.array([len(g) for g in grid])
    if occupancy.shape != tuple(dims - 1):
        raise ValueError(f"occupancy must have shape {tuple(dims - 1)}, got {occupancy.shape}")
    gx, gy, gz = np.meshgrid(*grid, indexing="ij")
    positions = np.column_stack((gx.ravel(), gy.ravel(), gz.ravel()))
    axis, sign, plane, a, b = _polycube_faces(*grid, occupancy)
    i, j = (axis + 1) % 3, (axis + 2) % 3
    quad_ab = np.array([[0, 0], [1, 0], [1, 1], [0, 1]])  # counter-clockwise about +e_axis
    corner = np.zeros((len(axis), 4, 3), dtype=np.int64)
    for k in range(3):  # the three axis directions
        m = axis == k
        corner[m, :, k] = plane[m][:, None]
        corner[m, :, (k + 1) % 3] = a[m][:, None] + quad_ab[:, 0]
        corner[m, :, (k + 2) % 3] = b[m][:, None] + quad_ab[:, 1]
    corner[sign < 0] = corner[sign < 0][:, [0, 3, 2, 1]]
    vid = (corner[..., 0] * dims[1] + corner[..., 1]) * dims[2] + corner[..., 2]
    faces = np.concatenate((vid[:, [0, 1, 2]], vid[:, [0, 2, 3]]))
    f_axis, f_sign, f_plane = (np.concatenate((x, x)) for x in (axis, sign, plane))
    pos = positions[faces]  # (f, 3, 3)
    corner_uv = np.zeros(pos.shape[:2] + (2,))
    corner_normals = np.zeros_like(pos)
    for k in range(3):
        m = f_axis == k
        corner_uv[m] = pos[m][:, :, [(k + 1) % 3, (k + 2) % 3]]
        corner_normals[m, :, k] = f_sign[m][:, None].astype(np.float64)
    face_island = (f_axis * 2 + (f_sign > 0)) * (int(dims.max()) + 1) + f_plane
    return Surface(positions, faces, corner_normals + 0.0, corner_uv + 0.0,
                   face_island.astype(np.int64), 0.0)


def _refine(breaks, max_edge):
    """Subdivide each interval of ``breaks`` into equal parts no longer than ``max_edge``."""
    breaks = np.asarray(breaks, dtype=np.float64)
    if max_edge is None:
        return breaks
    parts = [np.linspace(lo, hi, max(1, math.ceil((hi - lo) / max_edge - 1e-9)) + 1)[:-1]
             for lo, hi in zip(breaks[:-1], breaks[1:])]
    return np.concatenate(parts + [breaks[-1:]])


def _refined_polycube(breaks, occupancy, max_edge):
    """Polycube surface on refined breakpoints; occupancy looked up from the coarse cells."""
    fine = [_refine(b, max_edge) for b in breaks]
    cell = [np.searchsorted(b, 0.5 * (f[:-1] + f[1:])) - 1 for b, f in zip(breaks, fine)]
    occ = occupancy[np.ix_(*cell)]
    return polycube_surface(*fine, occ)


# --------------------------------------------------------------------------------------------------
# UV packing and mesh assembly
# --------------------------------------------------------------------------------------------------


def _shelf_fits(widths, heights, order, scale, margin):
    """Place islands on shelves at ``scale``; return lower-left offsets or None if they do not fit."""
    border = margin / 2.0
    x, y, shelf = border, border, 0.0
    offsets = np.zeros((len(widths), 2))
    for k in order:
        w, h = widths[k] * scale, heights[k] * scale
        if w > 1.0 - 2 * border:
            return None
        if x > border and x + w > 1.0 - border:
            x, y, shelf = border, y + shelf + margin, 0.0
        offsets[k] = (x, y)
        x += w + margin
        shelf = max(shelf, h)
    if y + shelf > 1.0 - border:
        return None
    return offsets


def _best_scale(widths, heights, order, margin):
    """Largest scale (bisection) at which the shelf placement in ``order`` fits, with its offsets."""
    lo, hi = 0.0, (1.0 - margin) / float(max(widths.max(), heights.max()))
    best = None
    for _ in range(50):
        mid = 0.5 * (lo + hi)
        placed = _shelf_fits(widths, heights, order, mid, margin)
        if placed is None:
            hi = mid
        else:
            lo, best = mid, placed
    return lo, best


def pack_islands(extents, margin: float = UV_MARGIN):
    """Pack island bounding boxes into the unit square at one common scale (shelf packing).

    Islands go left to right on shelves, ``margin`` apart and ``margin / 2`` from the border.  Each
    candidate -- every island landscape, every island portrait, and for up to 6 islands every mix of
    quarter turns -- is tried with three orderings (by height, width, area); the largest common scale
    (uniform texel density), found by bisection, wins.  Deterministic: ties keep the earlier candidate.

    Parameters
    ----------
    extents : (k, 2) float64
        Width and height of each island in world units.
    margin : float
        Gap between islands, fraction of the square.

    Returns
    -------
    scale : float
        UV units per world unit.
    offsets : (k, 2) float64
        Lower-left UV corner of each (possibly turned) island.
    turned : (k,) bool
        Islands to turn by +90 degrees (``(u, v) -> (-v, u)``) before scaling and offsetting.
    """
    extents = np.asarray(extents, dtype=np.float64)
    k = len(extents)
    portrait = extents[:, 1] > extents[:, 0]
    candidates = [portrait, ~portrait]  # turn to all-landscape, to all-portrait
    if k <= 6:
        candidates += [((m >> np.arange(k)) & 1).astype(bool) for m in range(2**k)]
    best = (-1.0, None, None)
    index = np.arange(k)
    for turned in candidates:
        w = np.where(turned, extents[:, 1], extents[:, 0])
        h = np.where(turned, extents[:, 0], extents[:, 1])
        for order in (np.lexsort((index, -h)), np.lexsort((index, -w)), np.lexsort((index, -w * h))):
            scale, offsets = _best_scale(w, h, order, margin)
            if offsets is not None and scale > best[0] * (1 + 1e-9):
                best = (scale, offsets, turned.copy())
    assert best[1] is not None, "no packing found"
    return best


def _cross2(a, b):
    return a[..., 0] * b[..., 1] - a[..., 1] * b[..., 0]


def assemble_mesh(surface: Surface, *, material=None, margin: float = UV_MARGIN) -> trimesh.Trimesh:
    """Pack a surface's UV islands and split vertices into an exported-asset-style mesh.

    Each island is mirrored if needed so its UV triangles wind like the outward faces, then packed
    (possibly turned by a quarter) with :func:`pack_islands` at one common scale.  A vertex is split wherever
    its UV or normal differs between faces (seams and hard edges), exactly as an exporter does.

    Parameters
    ----------
    surface : Surface
    material : trimesh.visual.material.Material, optional
        Defaults to a plain grey PBR material without textures.
    margin : float
        UV gap between islands.

    Returns
    -------
    trimesh.Trimesh
        Built with ``process=False``; ``vertex_normals`` and ``visual.uv`` set.
    """
    uv = surface.corner_uv.astype(np.float64).copy()
    _, isl = np.unique(surface.face_island, return_inverse=True)
    n_isl = int(isl.max()) + 1
    area = 0.5 * _cross2(uv[:, 1] - uv[:, 0], uv[:, 2] - uv[:, 0])
    flip = np.bincount(isl, weights=area, minlength=n_isl) < 0
    uv[flip[isl], :, 0] *= -1.0
    corner_isl = np.repeat(isl, 3)
    flat = uv.reshape(-1, 2)
    lo = np.full((n_isl, 2), np.inf)
    hi = np.full((n_isl, 2), -np.inf)
    np.minimum.at(lo, corner_isl, flat)
    np.maximum.at(hi, corner_isl, flat)
    scale, offsets, turn = pack_islands(hi - lo, margin)
    t = turn[corner_isl]
    flat[t] = np.column_stack((-flat[t, 1], flat[t, 0]))  # +90 deg keeps the winding
    lo = np.full((n_isl, 2), np.inf)
    np.minimum.at(lo, corner_isl, flat)
    flat = (flat - lo[corner_isl]) * scale + offsets[corner_isl]
    uv = flat.reshape(-1, 3, 2)
    assert np.all(_cross2(uv[:, 1] - uv[:, 0], uv[:, 2] - uv[:, 0]) > 0), "UV triangle folded over"

    key = np.column_stack((surface.faces.reshape(-1).astype(np.float64), flat,
                           surface.corner_normals.reshape(-1, 3))) + 0.0
    unique, inverse = np.unique(key, axis=0, return_inverse=True)
    vertices = surface.positions[unique[:, 0].astype(np.int64)]
    faces = inverse.reshape(-1, 3).astype(np.int64)
    normals = unique[:, 3:6] / np.linalg.norm(unique[:, 3:6], axis=1, keepdims=True)
    if material is None:
        material = trimesh.visual.material.PBRMaterial(
            name="grey", baseColorFactor=[200, 200, 200, 255], metallicFactor=0.0, roughnessFactor=0.8)
    mesh = trimesh.Trimesh(vertices=vertices, faces=faces, vertex_normals=normals,
                           visual=trimesh.visual.TextureVisuals(uv=unique[:, 1:3].copy(), material=material),
                           process=False)
    tri = vertices[faces]
    assert np.all(np.linalg.norm(np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), axis=1) > 0), \
        "zero-area triangle"
    return mesh


def uv_islands(mesh: trimesh.Trimesh) -> np.ndarray:
    """Label each face with its UV island.

    Faces are joined through shared vertices, where vertices with the same position and the same UV
    count as one (so a hard edge inside an island, which splits vertices only by normal, does not cut
    the island; a UV seam does).

    Parameters
    ----------
    mesh : trimesh.Trimesh
        A mesh with ``visual.uv``, vertices split at UV seams.

    Returns
    -------
    (f,) int64
        Island label per face, 0 .. n_islands - 1.
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    key = np.column_stack((np.asarray(mesh.vertices), np.asarray(mesh.visual.uv))) + 0.0
    _, weld = np.unique(key, axis=0, return_inverse=True)
    f = weld.reshape(-1)[np.asarray(mesh.faces)]
    edges = np.concatenate((f[:, [0, 1]], f[:, [1, 2]]))
    nv = int(weld.max()) + 1
    graph = coo_matrix((np.ones(len(edges)), (edges[:, 0], edges[:, 1])), shape=(nv, nv))
    _, labels = connected_components(graph, directed=False)
    _, face_labels = np.unique(labels[f[:, 0]], return_inverse=True)
    return face_labels.astype(np.int64)


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
    big = _positive(major_radius, "major_radius")
    small = _positive(minor_radius, "minor_radius")
    if small >= big:
        raise ValueError(f"minor_radius must be smaller than major_radius, got {small} >= {big}")
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
    r = _positive(radius, "radius")
    h = _positive(height, "height")
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
    ro = _positive(outer_radius, "outer_radius")
    ri = _positive(inner_radius, "inner_radius")
    if ri >= ro:
        raise ValueError(f"inner_radius must be smaller than outer_radius, got {ri} >= {ro}")
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
    a = _positive(length, "length")
    b = _positive(height, "height")
    d = _positive(depth, "depth")
    t1 = _positive(foot_thickness, "foot_thickness")
    t2 = _positive(wall_thickness, "wall_thickness")
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
    ro = _positive(shell_radius, "shell_radius")
    w = _positive(wall_thickness, "wall_thickness")
    rb = _positive(ball_radius, "ball_radius")
    g = _positive(gap, "gap")
    if w >= ro:
        raise ValueError(f"wall_thickness must be smaller than shell_radius, got {w} >= {ro}")
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


def _cone_args(radius, cone_half_angle_rad, lobe):
    if lobe not in ("cosine", "uniform"):
        raise ValueError(f"lobe must be 'cosine' or 'uniform', got {lobe!r}")
    radius = np.asarray(radius, dtype=np.float64)
    alpha = np.asarray(cone_half_angle_rad, dtype=np.float64)
    if np.any(~(radius > 0)):
        raise ValueError(f"radius must be > 0, got {radius}")
    if np.any(~((alpha >= 0) & (alpha <= np.pi / 2))):
        raise ValueError(f"cone_half_angle_rad must be in [0, pi/2], got {alpha}")
    return radius, np.cos(alpha)


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
    lobe : {"cosine", "uniform"}

    Returns
    -------
    float or ndarray
        Mean chord, scene units.

    Examples
    --------
    >>> round(sphere_cone_mean_chord(1.7, 1.0, "cosine"), 12)
    2.696257825099
    """
    radius, c = _cone_args(radius, cone_half_angle_rad, lobe)
    if lobe == "uniform":
        out = radius * (1.0 + c)
    else:
        out = 4.0 * radius * (1.0 + c + c * c) / (3.0 * (1.0 + c))
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
    lobe : {"cosine", "uniform"}

    Returns
    -------
    float or ndarray
        Scene units squared.
    """
    radius, c = _cone_args(radius, cone_half_angle_rad, lobe)
    if lobe == "uniform":
        out = 4.0 * radius**2 * (1.0 + c + c * c) / 3.0
    else:
        out = 2.0 * radius**2 * (1.0 + c * c)
    return float(out) if out.ndim == 0 else out


def _g1(x):
    """(1 - exp(-x)) / x, 1 at x = 0."""
    safe = np.where(x == 0, 1.0, x)
    return np.where(x == 0, 1.0, -np.expm1(-safe) / safe)


def _g2(x):
    """(1 - exp(-x)(1 + x)) / x^2, 1/2 at x = 0; Taylor series below 0.1 to avoid cancellation."""
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
    radius : float or array_like
        Sphere radius R, scene units.
    cone_half_angle_rad : float or array_like
        Cone half-angle alpha in [0, pi/2].
    lobe : {"cosine", "uniform"}
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
    radius, c = _cone_args(radius, cone_half_angle_rad, lobe)
    sigma = np.asarray(sigma, dtype=np.float64)
    if np.any(~(sigma >= 0)):
        raise ValueError(f"sigma must be >= 0, got {sigma}")
    tau = 2.0 * sigma * radius
    span = 1.0 - c
    x = tau * span
    if lobe == "uniform":
        out = np.exp(-tau * c) * _g1(x)
    else:
        out = 2.0 * np.exp(-tau * c) * (c * _g1(x) + span * _g2(x)) / (1.0 + c)
    return float(out) if out.ndim == 0 else out


# --------------------------------------------------------------------------------------------------
# Files
# --------------------------------------------------------------------------------------------------


def atomic_write_bytes(path, data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically: a temporary file in the same folder, then ``os.replace``.

    Parameters
    ----------
    path : str or os.PathLike
    data : bytes

    Returns
    -------
    pathlib.Path
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{secrets.token_hex(6)}.tmp")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return path


def obj_bytes(mesh: trimesh.Trimesh, *, digits: int = 10, comment: str | None = None) -> bytes:
    """Wavefront OBJ text (v, vt, vn, f) of a UV-mapped mesh, without material references.

    trimesh writes an ``mtllib``/``usemtl`` pair for any textured mesh; they are dropped so the file
    stands alone.

    Parameters
    ----------
    mesh : trimesh.Trimesh
    digits : int
        Decimal places written for every number.
    comment : str, optional
        A header comment line.

    Returns
    -------
    bytes
    """
    from trimesh.exchange.obj import export_obj

    text = export_obj(mesh, include_normals=True, include_texture=True, digits=digits, header=None,
                      mtl_name="unused.mtl")
    lines = [ln for ln in text.splitlines() if not ln.startswith(("mtllib ", "usemtl "))]
    if comment:
        lines.insert(0, f"# {comment}")
    return ("\n".join(lines).strip("\n") + "\n").encode()


def glb_bytes(mesh: trimesh.Trimesh, name: str) -> bytes:
    """Binary glTF of one mesh in a one-node scene named ``name`` (trimesh flips v to glTF's convention)."""
    scene = trimesh.Scene()
    scene.add_geometry(mesh, geom_name=name, node_name=name)
    return scene.export(file_type="glb")


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


def _positive_int(value, name) -> int:
    if isinstance(value, bool) or int(value) != value:
        raise TypeError(f"{name} must be an integer, got {value!r}")
    v = int(value)
    if v < 1:
        raise ValueError(f"{name} must be >= 1, got {value!r}")
    return v
