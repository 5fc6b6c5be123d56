"""Geometry checks of a user's asset before baking: orientation of every face, and inward rays that meet front faces.

Both work on the position-merged trace mesh of :class:`thickbake.pipeline.load.Asset` (seams welded), so
they see the solid the ray engine sees.

Orientation
-----------
Two triangles sharing an edge are wound consistently when they traverse it in opposite directions.
Give each triangle a flip bit s; consistency asks s_f XOR s_g = [f and g traverse the edge the same
way].  A breadth-first spanning tree of the face-adjacency graph (scipy.sparse.csgraph) fixes s
relative to one root face per connected part; the XOR of the labels along each tree path is
accumulated by pointer jumping (log₂ depth vectorised passes, no per-face loop).  Each part is then
turned outward by a ray-parity test (Jordan–Brouwer separation: a point is outside a closed surface
when a ray from it crosses the surface an even number of times): from just off a few of the part's
largest faces, along their normals, the crossings with the *whole* mesh are counted; an odd count
means the normals point into material and the part is inside-out.  Parity, not the part's signed
volume, so that the inner wall of a cavity (which faces inward by design) counts as correct.  Faces
whose final flip bit is set are wound opposite to the outward orientation: either a patch wound
against its neighbours, or a whole part that is inside-out.  Adjacencies that still disagree after the
assignment (only possible on non-orientable surfaces) are counted as conflicts.  Edges shared by
more than two faces are left out of the graph and reported by the caller as non-manifold.

Front-face hits
---------------
On a closed, outward-wound mesh without self-intersections, a ray that starts just inside the
surface leaves the solid through a face whose outward normal points along the ray (a back face, as
seen from the ray).  A first hit on a front face (normal · direction < 0) means the ray was not in
the solid where the mesh says it is: intersecting or overlapping parts, internal faces, inside-out
patches, or a hole through which it left and hit the outside of another part.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from thickbake.constants import BIAS_DIAGONAL_FRACTION, EDGE_MARGIN_BIASES, PARITY_STEP_FRACTION
from thickbake.geometry import double_areas, triangle_cross, triangle_edges, unit_normals


@dataclass
class OrientationReport:
    """Outcome of :func:`face_orientation`.

    Attributes
    ----------
    faces : int
    wrong_faces : (k,) int64
        Indices of faces wound against the outward orientation of their part.
    parts : int
        Connected parts (through manifold edges).
    inside_out_parts : int
        Parts whose consistent orientation has negative volume (as stored, after the whole-mesh fix
        the loader may already have applied).
    conflicts : int
        Adjacent face pairs still inconsistent after the assignment (non-orientable surfaces).
    """

    faces: int
    wrong_faces: np.ndarray
    parts: int
    inside_out_parts: int
    conflicts: int

    @property
    def wrong_share(self) -> float:
        return len(self.wrong_faces) / self.faces if self.faces else 0.0


def _manifold_adjacency(faces: np.ndarray):
    """Pairs of faces sharing an edge used by exactly two faces, and whether they agree in direction.

    Returns
    -------
    pairs : (m, 2) int64
    same_direction : (m,) bool
        True when both faces traverse the shared edge the same way (inconsistent winding).
    """
    directed = triangle_edges(faces, directed=True)
    owner = np.repeat(np.arange(len(faces)), 3)
    key = np.sort(directed, axis=1)
    forward = directed[:, 0] < directed[:, 1]
    order = np.lexsort((key[:, 1], key[:, 0]))
    key, owner, forward = key[order], owner[order], forward[order]
    start = np.r_[True, (key[1:] != key[:-1]).any(axis=1)]
    group = np.cumsum(start) - 1
    counts = np.bincount(group)
    two = counts[group] == 2
    first = start & two
    idx = np.flatnonzero(first)
    pairs = np.stack([owner[idx], owner[idx + 1]], axis=1)
    same = forward[idx] == forward[idx + 1]
    keep = pairs[:, 0] != pairs[:, 1]
    pairs, same = pairs[keep], same[keep]
    # two faces sharing two edges (a fold) count once; a disagreement between them shows as a conflict
    _, first_of = np.unique(np.sort(pairs, axis=1), axis=0, return_index=True)
    first_of = np.sort(first_of)
    return pairs[first_of], same[first_of]


def face_orientation(vertices: np.ndarray, faces: np.ndarray, engine) -> OrientationReport:
    """Find faces wound against the outward orientation of their connected part.

    Parameters
    ----------
    vertices : (m, 3) float64
        Position-merged vertices, scene units.
    faces : (f, 3) int64
    engine : ray engine over (vertices, faces) with ``first_hit``

    Returns
    -------
    OrientationReport
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import breadth_first_order, connected_components

    n = len(faces)
    pairs, same = _manifold_adjacency(faces)
    # graph with a virtual root (node n) joined to one face of every part, so one BFS covers all
    graph = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n))
    parts, label = connected_components(graph, directed=False)
    roots = np.unique(label, return_index=True)[1]
    rows = np.r_[pairs[:, 0], pairs[:, 1], np.full(len(roots), n), roots]
    cols = np.r_[pairs[:, 1], pairs[:, 0], roots, np.full(len(roots), n)]
    flag = np.r_[same, same, np.zeros(2 * len(roots), bool)].astype(np.int8)
    full = coo_matrix((np.ones(len(rows)), (rows, cols)), shape=(n + 1, n + 1)).tocsr()
    _, parent = breadth_first_order(full, n, directed=False, return_predecessors=True)
    parent = parent[:n].astype(np.int64)
    # label of each tree edge (face, parent): look it up in a sparse matrix of flags + 1
    lookup = coo_matrix((flag.astype(np.float64) + 1.0, (rows, cols)), shape=(n + 1, n + 1)).tocsr()
    edge_flag = np.asarray(lookup[np.arange(n), parent]).ravel() - 1.0  # each pair is stored once
    acc = np.rint(edge_flag).astype(np.int8)
    up = parent.copy()
    up[up == n] = -1
    # pointer jumping: acc[f] = XOR of flags from f to its root
    while (up >= 0).any():
        has = up >= 0
        nxt = np.where(has, up, 0)
        acc = np.where(has, acc ^ acc[nxt], acc)
        up = np.where(has, up[nxt], -1)
    flip = acc.astype(bool)
    oriented = np.where(flip[:, None], faces[:, ::-1], faces)
    inside_out = _parts_inside_out(vertices, oriented, label, parts, engine)
    final = flip ^ inside_out[label]
    conflicts = int(np.count_nonzero((final[pairs[:, 0]] ^ final[pairs[:, 1]]) != same))
    return OrientationReport(faces=n, wrong_faces=np.flatnonzero(final), parts=int(parts),
                             inside_out_parts=int(inside_out.sum()), conflicts=conflicts)


#: Faces per part whose parity rays vote on the part's orientation (the largest ones).
PARITY_VOTES = 3
#: Crossing counts stop after this many hits along one ray (nesting deeper than this is not expected).
PARITY_MAX_CROSSINGS = 256


def _parts_inside_out(vertices, faces, label, parts, engine) -> np.ndarray:
    """(parts,) bool: parts whose (consistently wound) normals point into material, by ray parity."""
    tri = vertices[faces]
    cross = triangle_cross(tri)
    area = double_areas(tri, cross)
    diagonal = float(np.linalg.norm(vertices.max(axis=0) - vertices.min(axis=0)))
    # the PARITY_VOTES largest faces of every part
    order = np.lexsort((-area, label))
    first = np.r_[0, np.flatnonzero(np.diff(label[order])) + 1]
    rank = np.arange(len(order)) - np.repeat(first, np.diff(np.r_[first, len(order)]))
    pick = order[(rank < PARITY_VOTES) & (area[order] > 0)]
    normal = cross[pick] / area[pick, None]
    step = PARITY_STEP_FRACTION * diagonal
    origins = tri[pick].mean(axis=1) + step * normal
    direction = normal.astype(np.float32)
    crossings = np.zeros(len(pick), np.int64)
    active = np.arange(len(pick))
    for _ in range(PARITY_MAX_CROSSINGS):
        if not len(active):
            break
        distance, hit = engine.first_hit(origins[active].astype(np.float32), np.ascontiguousarray(direction[active]),
                                         4.0 * diagonal)
        crossings[active[hit]] += 1
        origins[active[hit]] += (distance[hit, None].astype(np.float64) + step) * direction[active[hit]]
        active = active[hit]
    odd = np.bincount(label[pick], weights=(crossings % 2).astype(np.float64), minlength=parts)
    votes = np.bincount(label[pick], minlength=parts)
    return odd * 2 > votes


@dataclass
class FrontHitReport:
    """Outcome of :func:`front_face_hits`: ray counts by what they met first."""

    rays: int
    front: int
    back: int
    missed: int

    @property
    def front_share(self) -> float:
        return self.front / self.rays if self.rays else 0.0

    @property
    def missed_share(self) -> float:
        return self.missed / self.rays if self.rays else 0.0


def front_face_hits(asset, engine, rays: int = 1 << 16, seed: int = 0, bias: float | None = None) -> FrontHitReport:
    """Cast cosine-distributed inward rays from random surface points and classify their first hit.

    Points are uniform by area (face chosen by area, uniform barycentrics), directions cosine-weighted
    about the inward *geometric* normal, origins placed as the bake places them: ``bias`` (default
    10⁻⁴ × diagonal, the bake's default) inside, kept off triangle edges, and closer where the solid
    is thinner than that (:func:`thickbake.pipeline.origins.inward_origins`).

    Parameters
    ----------
    asset : thickbake.pipeline.load.Asset
    engine : ray engine over ``asset.trace_vertices``/``trace_faces`` with ``first_hit_faces``
    rays : int
    seed : int
    bias : float, optional
        Scene units.
    """
    from thickbake.pipeline.directions import ray_directions
    from thickbake.pipeline.texels import keep_off_edges
    from thickbake.pipeline.origins import inward_origins

    rng = np.random.default_rng(seed)
    tri = asset.trace_vertices[asset.trace_faces]
    cross = triangle_cross(tri)
    double_area = double_areas(tri, cross)
    normal = unit_normals(tri, cross, double_area)
    face = rng.choice(len(tri), size=rays, p=double_area / double_area.sum())
    r = rng.random((rays, 2))
    flipped = r.sum(axis=1) > 1
    r[flipped] = 1 - r[flipped]
    b = asset.diagonal * BIAS_DIAGONAL_FRACTION if bias is None else bias
    # the bake's own origin placement: off triangle edges, and closer to the surface where the solid
    # is thinner than the bias, so a thin rim does not read as a hole
    bary = keep_off_edges(tri, face, np.column_stack([1 - r.sum(axis=1), r]), EDGE_MARGIN_BIASES * b)
    points = np.einsum("nk,nkj->nj", bary, tri[face])
    inward = -normal[face]
    origins, _, _ = inward_origins(engine, points, normal[face], normal, b)
    u = rng.random((2, rays, 1)).astype(np.float32)
    directions, _ = ray_directions(u[0], u[1], inward.astype(np.float32), 90.0, "cosine")
    _, hit, hit_face = engine.first_hit_faces(np.ascontiguousarray(origins), directions, 2.0 * asset.diagonal)
    facing = np.einsum("ij,ij->i", normal[np.where(hit, hit_face, 0)], directions.astype(np.float64))
    front = hit & (facing < 0)
    return FrontHitReport(rays=int(rays), front=int(front.sum()), back=int((hit & ~front).sum()),
                          missed=int((~hit).sum()))


__all__ = ["OrientationReport", "face_orientation", "FrontHitReport", "front_face_hits"]
