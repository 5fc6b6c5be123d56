"""Triangle surfaces with UV islands, and the exported-asset meshes packed from them.

What it builds
--------------
A :class:`Surface` is a welded, outward-wound triangle surface with a normal per face corner and
island-local UVs, before packing.  Two builders make one:

* :func:`revolve` turns a meridian profile about +z.  The profile is a chain of :class:`ProfilePiece`
  (straight :func:`line_piece`, circular :func:`arc_piece`); each run of pieces with one island label
  becomes a disk island (if it touches the axis) or a strip island.  :func:`sphere_surface` is the UV
  sphere built this way: an equatorial band plus two polar caps.
* :func:`polycube_surface` bounds a union of rectilinear grid cells, one island per face plane.

:func:`join_surfaces` and :meth:`Surface.transformed` combine and place surfaces.  :func:`assemble_mesh`
packs the islands into the unit square at one common scale (:func:`pack_islands`, shelf packing) and
splits vertices wherever the UV or normal differs between faces, as an exporter does, giving a
``trimesh.Trimesh``.  :func:`uv_islands` recovers the islands of such a mesh; :func:`obj_bytes` and
:func:`glb_bytes` serialise it.  :mod:`thickbake.shapes` builds its analytic solids from these, and
``scripts/make_samples.py`` its demo assets.

Conventions
-----------
* Lengths are in the caller's scene units; angles in radians.
* Surfaces of revolution have +z as their axis.  A profile lies in the (rho, z) half-plane and is
  walked with the solid on its left, so the outward normal is the tangent turned clockwise.
* Faces are wound outward; corner normals are the outward unit normals of the ideal surface, so they
  differ across hard edges.
* Before packing, UVs are in world units (area-faithful up to each layout's stated distortion).  After
  :func:`assemble_mesh` they lie in [0, 1]^2 in the OBJ convention (v up, origin lower-left), islands
  :data:`ISLAND_GAP` apart and half that from the border.  trimesh flips v when it writes or reads glTF,
  so GLB files round-trip to the same numbers.
* ``facet_error`` is an upper bound on the Hausdorff distance between the faceted surface and the
  ideal one, in scene units.  Polycube faces are the ideal surface, so theirs is 0.

Facet error of a surface of revolution
--------------------------------------
With ``n`` vertices per ring, let P be the polyline through the profile samples and C the surface
swept by revolving P.  The bound :func:`revolve` returns follows in three steps:

1. Mesh to C.  Between two rings each quad is a planar isosceles trapezoid (at a pole, a fan
   triangle), and it is the union of the straight segments joining points at equal fractions along its
   two slanted edges.  Each such segment joins two points of a single circle of C whose angles differ
   by ``2*pi/n`` and whose radius is at most ``rho_max``, the larger end radius of the profile
   segment; it therefore stays within the sagitta ``rho_max * (1 - cos(pi/n))`` of that circle, and
   every point of C is as close to the mesh.
2. C to the ideal surface.  Revolving the distance between a piece's ideal curve and its polyline
   moves no point further than the piece's ``sag``: 0 for a line, ``radius * (1 - cos(dt/2))`` for an
   arc sampled every ``dt``.
3. The triangle inequality adds the two: ``facet_error = max over profile segments of
   (rho_max * (1 - cos(pi/n)) + sag)``.  For :func:`sphere_surface` (``rho_max <= R``, arc step
   ``2*pi/n``) that is at most ``2R * (1 - cos(pi/n))``.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import trimesh

from thickbake.geometry import double_areas

__all__ = [
    "Surface",
    "ProfilePiece",
    "ISLAND_GAP",
    "line_piece",
    "arc_piece",
    "revolve",
    "sphere_surface",
    "polycube_surface",
    "join_surfaces",
    "pack_islands",
    "assemble_mesh",
    "uv_islands",
    "obj_bytes",
    "glb_bytes",
]

#: Gap between packed UV islands, as a fraction of the unit square (half of it at the border).  1/32 is
#: 8 texels at 256 px and 32 at 1024 px, room for edge padding on both sides of a seam.
ISLAND_GAP = 1.0 / 32.0


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
    profile = _profile(pieces, closed)
    positions, cos_t, sin_t = _ring_positions(profile, n)
    faces, cj, ci, fj, fi = _ring_faces(profile, n)
    corner_normals = _piece_normals(pieces, profile, cj, fj, ci, cos_t, sin_t, n)
    corner_uv, face_island = _island_uvs(pieces, profile, cj, fj, ci, fi, cos_t, sin_t, n)
    rho, seg_piece = profile.rho, profile.seg_piece
    sag = np.array([p.sag for p in pieces])[seg_piece]
    rho_max = np.maximum(rho[:-1], rho[1:])
    facet_error = float(np.max(rho_max * (1.0 - math.cos(math.pi / n)) + sag))
    return Surface(positions, faces.astype(np.int64), corner_normals, corner_uv,
                   face_island.astype(np.int64), facet_error)


@dataclass
class _Profile:
    """A meridian profile unwrapped into one polyline (see :func:`revolve`)."""

    rho: np.ndarray        # (S + 1,) radius of each unwrapped point
    z: np.ndarray          # (S + 1,) height of each unwrapped point
    seg_piece: np.ndarray  # (S,) piece of each segment
    seg_local: np.ndarray  # (S,) index of each segment within its piece
    wrap: np.ndarray       # (S + 1,) unwrapped point -> stored point
    pole: np.ndarray       # (stored points,) points on the axis
    n_seg: int
    n_pts: int


def _profile(pieces: list, closed: bool) -> _Profile:
    """Join the pieces into one validated polyline; find the poles and the stored points."""
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
    return _Profile(rho, z, seg_piece, seg_local, wrap, pole, n_seg, n_pts)


def _ring_positions(profile: _Profile, n: int):
    """(v, 3) welded positions, one vertex per pole and ``n`` per ring, and the ring's cos/sin of phi."""
    rho, z, pole, n_pts = profile.rho, profile.z, profile.pole, profile.n_pts
    count = np.where(pole, 1, n)
    offset = np.cumsum(count) - count
    cos_t = np.cos(2.0 * np.pi * np.arange(n) / n)
    sin_t = np.sin(2.0 * np.pi * np.arange(n) / n)
    pt = np.repeat(np.arange(n_pts), count)
    col = np.arange(int(count.sum())) - offset[pt]
    positions = np.column_stack((rho[pt] * cos_t[col], rho[pt] * sin_t[col], z[pt])) + 0.0
    return positions, cos_t, sin_t


def _ring_faces(profile: _Profile, n: int):
    """(f, 3) faces over the welded positions, and each corner's (point, column) and face's (segment, column)."""
    n_seg, wrap, pole = profile.n_seg, profile.wrap, profile.pole
    count = np.where(pole, 1, n)
    offset = np.cumsum(count) - count
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
    return faces, cj, ci, fj, fi


def _piece_normals(pieces: list, profile: _Profile, cj, fj, ci, cos_t, sin_t, n: int) -> np.ndarray:
    """(f, 3, 3) corner normals: each face takes its own piece's normal at the corner (hard edges between pieces)."""
    pole, wrap, seg_piece, seg_local = profile.pole, profile.wrap, profile.seg_piece, profile.seg_local
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
    return corner_normals


def _island_uvs(pieces: list, profile: _Profile, cj, fj, ci, fi, cos_t, sin_t, n: int):
    """(f, 3, 2) corner UVs in world units and (f,) island of each face (see :func:`revolve`)."""
    rho, z, pole, wrap, seg_piece = profile.rho, profile.z, profile.pole, profile.wrap, profile.seg_piece
    cc, ss = cos_t[ci % n], sin_t[ci % n]
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
    return corner_uv, face_island


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


def _shelf_fits(widths, heights, order, scale, gap):
    """Place islands on shelves at ``scale``; return lower-left offsets or None if they do not fit."""
    border = gap / 2.0
    x, y, shelf = border, border, 0.0
    offsets = np.zeros((len(widths), 2))
    for k in order:
        w, h = widths[k] * scale, heights[k] * scale
        if w > 1.0 - 2 * border:
            return None
        if x > border and x + w > 1.0 - border:
            x, y, shelf = border, y + shelf + gap, 0.0
        offsets[k] = (x, y)
        x += w + gap
        shelf = max(shelf, h)
    if y + shelf > 1.0 - border:
        return None
    return offsets


def _best_scale(widths, heights, order, gap):
    """Largest scale (bisection) at which the shelf placement in ``order`` fits, with its offsets."""
    lo, hi = 0.0, (1.0 - gap) / float(max(widths.max(), heights.max()))
    best = None
    for _ in range(50):
        mid = 0.5 * (lo + hi)
        placed = _shelf_fits(widths, heights, order, mid, gap)
        if placed is None:
            hi = mid
        else:
            lo, best = mid, placed
    return lo, best


def pack_islands(extents, gap: float = ISLAND_GAP):
    """Pack island bounding boxes into the unit square at one common scale (shelf packing).

    Islands go left to right on shelves, ``gap`` apart and ``gap / 2`` from the border.  Each
    candidate -- every island landscape, every island portrait, and for up to 6 islands every mix of
    quarter turns -- is tried with three orderings (by height, width, area); the largest common scale
    (uniform texel density), found by bisection, wins.  Deterministic: ties keep the earlier candidate.

    Parameters
    ----------
    extents : (k, 2) float64
        Width and height of each island in world units.
    gap : float
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
            scale, offsets = _best_scale(w, h, order, gap)
            if offsets is not None and scale > best[0] * (1 + 1e-9):
                best = (scale, offsets, turned.copy())
    assert best[1] is not None, "no packing found"
    return best


def _cross2(a, b):
    return a[..., 0] * b[..., 1] - a[..., 1] * b[..., 0]


def assemble_mesh(surface: Surface, *, material=None, gap: float = ISLAND_GAP) -> trimesh.Trimesh:
    """Pack a surface's UV islands and split vertices into an exported-asset-style mesh.

    Each island is mirrored if needed so its UV triangles wind like the outward faces, then packed
    (possibly turned by a quarter) with :func:`pack_islands` at one common scale.  A vertex is split wherever
    its UV or normal differs between faces (seams and hard edges), exactly as an exporter does.

    Parameters
    ----------
    surface : Surface
    material : trimesh.visual.material.Material, optional
        Defaults to a plain grey PBR material without textures.
    gap : float
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
    scale, offsets, turn = pack_islands(hi - lo, gap)
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
    assert np.all(double_areas(tri) > 0), \
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
# Files
# --------------------------------------------------------------------------------------------------


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
    # a value that rounds to zero is written "0.000…" whatever its sign: the last bit of a normal's
    # component then cannot change the file's bytes between numpy builds (the samples must regenerate
    # byte for byte)
    text = re.sub(r"(?<![^\s])-(0\.0+)(?![^\s])", r"\1", text)
    lines = [ln for ln in text.splitlines() if not ln.startswith(("mtllib ", "usemtl "))]
    if comment:
        lines.insert(0, f"# {comment}")
    return ("\n".join(lines).strip("\n") + "\n").encode()


def glb_bytes(mesh: trimesh.Trimesh, name: str) -> bytes:
    """Binary glTF of one mesh in a one-node scene named ``name`` (trimesh flips v to glTF's convention)."""
    scene = trimesh.Scene()
    scene.add_geometry(mesh, geom_name=name, node_name=name)
    return scene.export(file_type="glb")


# --------------------------------------------------------------------------------------------------
# Argument checks
# --------------------------------------------------------------------------------------------------


def _positive_int(value, name) -> int:
    if isinstance(value, bool) or int(value) != value:
        raise TypeError(f"{name} must be an integer, got {value!r}")
    v = int(value)
    if v < 1:
        raise ValueError(f"{name} must be >= 1, got {value!r}")
    return v
