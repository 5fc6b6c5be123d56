"""Tests for thickbake.shapes: mesh validity, UV layout, and every closed form against an independent check.

Independent checks used here, named beside each assertion:
* ray casting on the position-merged mesh with trimesh's float64 ray-triangle intersector
  (``trimesh.ray.ray_triangle.RayMeshIntersector``, R-tree candidates then plane/barycentric test);
* numerical integration of the defining integrals with ``scipy.integrate.quad`` / ``dblquad``;
* bracketing of the root of the implicit torus equation with ``scipy.optimize.brentq``;
* inclusion bounds for nested convex bodies (volume and surface area are monotone under inclusion
  of convex bodies; for area by Cauchy's surface-area formula, Santaló 1976).
Tolerances are derived from ``facet_error`` (see thickbake.shapes.revolve), the quadrature error
estimate, or float rounding, never tuned.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import trimesh
from scipy import integrate, optimize
from trimesh.ray.ray_triangle import RayMeshIntersector

from thickbake.checks import shapes as S
from thickbake.errors import ThickbakeError
from thickbake.lobes import LOBES, Lobe

EPS = np.finfo(np.float64).eps
F32 = 2.0**-24  # float32 unit roundoff (glTF stores float32)
NAMES = ["sphere", "torus", "box", "capped_cylinder", "hollow_shell", "l_block", "shell_and_ball"]
CURVED = ["sphere", "torus", "capped_cylinder", "hollow_shell", "shell_and_ball"]
SAMPLES = Path(__file__).resolve().parents[1] / "samples"


@pytest.fixture(scope="module")
def shapes():
    return {s.name: s for s in S.analytic_set() + [S.shell_and_ball()]}


@pytest.fixture(params=NAMES)
def shape(request, shapes):
    return shapes[request.param]


def merged(mesh):
    m = mesh.copy()
    m.merge_vertices(merge_tex=True, merge_norm=True)
    return m


def scale_of(shape):
    return float(np.ptp(shape.mesh.vertices, axis=0).max())


def uv_area(uv_tri):
    e, g = uv_tri[:, 1] - uv_tri[:, 0], uv_tri[:, 2] - uv_tri[:, 0]
    return 0.5 * (e[:, 0] * g[:, 1] - e[:, 1] * g[:, 0])


# ---------------------------------------------------------------------------------------------
# Geometry of the meshes
# ---------------------------------------------------------------------------------------------


def test_closed_outward_and_split_at_seams(shape):
    m = merged(shape.mesh)
    assert m.is_watertight, "position-merged mesh must be closed"
    assert m.is_winding_consistent
    assert m.volume > 0, "outward winding gives positive volume"
    assert not shape.mesh.is_watertight, "raw mesh is split at UV seams like an exported asset"
    # no zero-area faces: area well above float noise of the scene scale
    assert shape.mesh.area_faces.min() > 1e3 * EPS * scale_of(shape) ** 2


def test_box_has_24_vertices(shapes):
    assert len(shapes["box"].mesh.vertices) == 24
    assert len(shapes["box"].mesh.faces) == 12


def test_vertex_normals_analytic(shape):
    n = shape.mesh.vertex_normals
    np.testing.assert_allclose(np.linalg.norm(n, axis=1), 1.0, atol=1e-12)
    # every corner normal is on the outer side of its face
    fn = shape.mesh.face_normals
    assert np.all(np.einsum("fij,fj->fi", n[shape.mesh.faces], fn) > 0.5)
    if shape.name in ("sphere", "torus", "hollow_shell", "shell_and_ball"):
        # smooth shapes: the vertex normal is the analytic normal at the vertex
        np.testing.assert_allclose(n, shape.surface_normal(shape.mesh.vertices), atol=1e-12)


def test_uv_range_orientation_and_density(shape):
    uv = shape.mesh.visual.uv
    assert uv.shape == (len(shape.mesh.vertices), 2) and uv.dtype == np.float64
    assert uv.min() >= 0.0 and uv.max() <= 1.0
    a = uv_area(uv[shape.mesh.faces])
    assert np.all(a > 0), "UV triangles wind like the outward faces (no mirrored islands)"
    ratio = a / shape.mesh.area_faces
    med = np.median(ratio)
    assert ratio.min() > med / 3 and ratio.max() < med * 3, "texel density uniform within 3x"


def test_uv_islands_separated(shape):
    isl = S.uv_islands(shape.mesh)
    k = int(isl.max()) + 1
    assert k >= 2
    uv = shape.mesh.visual.uv[shape.mesh.faces]
    lo = np.full((k, 2), np.inf)
    hi = np.full((k, 2), -np.inf)
    np.minimum.at(lo, np.repeat(isl, 3), uv.reshape(-1, 2))
    np.maximum.at(hi, np.repeat(isl, 3), uv.reshape(-1, 2))
    for i in range(k):  # a handful of islands
        for j in range(i + 1, k):
            gap = max(lo[i, 0] - hi[j, 0], lo[j, 0] - hi[i, 0], lo[i, 1] - hi[j, 1], lo[j, 1] - hi[i, 1])
            assert gap >= 0.02, f"islands {i} and {j} are {gap:.4f} apart (< 2 % of the square)"


def rasterise_count(uv_tri, size):
    """How many triangles strictly cover each texel centre ((i + 0.5) / size), fully vectorised."""
    p = uv_tri * size - 0.5  # texel-centre coordinates are integers
    i0 = np.clip(np.ceil(p[..., 0].min(1)), 0, size - 1).astype(np.int64)
    i1 = np.clip(np.floor(p[..., 0].max(1)), 0, size - 1).astype(np.int64)
    j0 = np.clip(np.ceil(p[..., 1].min(1)), 0, size - 1).astype(np.int64)
    j1 = np.clip(np.floor(p[..., 1].max(1)), 0, size - 1).astype(np.int64)
    w = np.maximum(i1 - i0 + 1, 0)
    h = np.maximum(j1 - j0 + 1, 0)
    count = w * h
    tri = np.repeat(np.arange(len(p)), count)
    local = np.arange(count.sum()) - np.repeat(np.cumsum(count) - count, count)
    ci = i0[tri] + local % w[tri]
    cj = j0[tri] + local // w[tri]
    q = np.column_stack((ci, cj)).astype(np.float64)
    a, b, c = p[tri, 0], p[tri, 1], p[tri, 2]
    e0 = S._cross2(b - a, q - a)
    e1 = S._cross2(c - b, q - b)
    e2 = S._cross2(a - c, q - c)
    inside = (e0 > 1e-12) & (e1 > 1e-12) & (e2 > 1e-12)  # strict: shared edges are not double-counted
    return np.bincount(cj[inside] * size + ci[inside], minlength=size * size)


def test_uv_islands_do_not_overlap(shape):
    count = rasterise_count(shape.mesh.visual.uv[shape.mesh.faces], 256)
    assert count.max() == 1, f"{int((count > 1).sum())} texel centres covered twice"
    assert (count == 1).mean() > 0.3, "layout uses a fair share of the square"


def test_rasteriser_detects_overlap():
    tri = np.array([[[0.1, 0.1], [0.6, 0.1], [0.1, 0.6]]])
    assert rasterise_count(np.concatenate((tri, tri + 0.05)), 64).max() == 2


# ---------------------------------------------------------------------------------------------
# Facet error and the measures of the mesh against the ideal solid
# ---------------------------------------------------------------------------------------------


def ideal_distance(shape, x):
    """Exact distance from points to the ideal surface (closed forms of each primitive)."""
    p = shape.params
    if shape.name == "sphere":
        return np.abs(np.linalg.norm(x, axis=1) - p["radius"])
    if shape.name == "torus":
        rho = np.hypot(x[:, 0], x[:, 1])
        return np.abs(np.hypot(rho - p["major_radius"], x[:, 2]) - p["minor_radius"])
    if shape.name == "capped_cylinder":
        rho = np.hypot(x[:, 0], x[:, 1])
        dr, dz = rho - p["radius"], np.abs(x[:, 2]) - p["height"] / 2
        inside = (dr <= 0) & (dz <= 0)
        return np.where(inside, np.minimum(-dr, -dz), np.hypot(np.maximum(dr, 0), np.maximum(dz, 0)))
    if shape.name == "hollow_shell":
        r = np.linalg.norm(x, axis=1)
        return np.minimum(np.abs(r - p["outer_radius"]), np.abs(r - p["inner_radius"]))
    if shape.name == "shell_and_ball":
        r = np.linalg.norm(x, axis=1)
        rb = np.linalg.norm(x - [p["ball_center_x"], 0, 0], axis=1)
        return np.minimum.reduce([np.abs(r - p["shell_radius"]), np.abs(r - p["inner_radius"]),
                                  np.abs(rb - p["ball_radius"])])
    raise KeyError(shape.name)


@pytest.mark.parametrize("name", CURVED)
def test_facet_error_bounds_distance_to_ideal_surface(shapes, name):
    shape = shapes[name]
    tri = shape.mesh.triangles
    # vertices, edge midpoints (the diagonal midpoint is a trapezoid's deepest point) and centroids
    bary = np.array([[1, 0, 0], [.5, .5, 0], [0, .5, .5], [.5, 0, .5], [1 / 3, 1 / 3, 1 / 3],
                     [.25, .25, .5], [.5, .25, .25], [.25, .5, .25]])
    pts = np.einsum("bk,fkj->fbj", bary, tri).reshape(-1, 3)
    d = ideal_distance(shape, pts)
    assert d.max() <= shape.facet_error * (1 + 1e-9)
    # the bound is derived, not loose: it is reached to within a factor 2
    assert d.max() >= 0.5 * shape.facet_error


def test_flat_shapes_are_exact(shapes):
    # planar solids: the mesh is the ideal solid; volume and area agree to float rounding
    for name in ("box", "l_block"):
        s = shapes[name]
        assert s.facet_error == 0.0
        np.testing.assert_allclose(s.volume_mesh, s.volume_exact, rtol=1e-13)
        np.testing.assert_allclose(s.area_mesh, s.area_exact, rtol=1e-13)
        fn = s.mesh.face_normals
        np.testing.assert_allclose(np.abs(fn).max(axis=1), 1.0, atol=1e-15)  # axis-aligned faces


@pytest.mark.parametrize("make", [lambda: S.box(max_edge=0.1), lambda: S.l_block(max_edge=0.1)])
def test_subdivided_flat_shapes(make):
    """max_edge grids stay conforming (closed after merging), exact, and keep one island per face."""
    s = make()
    m = merged(s.mesh)
    assert len(s.mesh.faces) > 500 and m.is_watertight and m.is_winding_consistent
    np.testing.assert_allclose([s.volume_mesh, s.area_mesh], [s.volume_exact, s.area_exact], rtol=1e-13)
    assert S.uv_islands(s.mesh).max() + 1 == {"box": 6, "l_block": 8}[s.name]
    assert rasterise_count(s.mesh.visual.uv[s.mesh.faces], 256).max() == 1
    pts, face = trimesh.sample.sample_surface(m, 100, seed=5)
    n = m.face_normals[face]  # planar faces: the facet normal is the analytic normal
    np.testing.assert_allclose(s.surface_normal(pts), n, atol=1e-12)
    o = pts - 1e-5 * n
    loc, ray, _ = RayMeshIntersector(m).intersects_location(o, -n, multiple_hits=False)
    assert len(ray) == len(o)
    np.testing.assert_allclose(np.linalg.norm(loc - o[ray], axis=1), s.normal_chord(o, n)[ray], rtol=0, atol=1e-9)


def convex_part_bracket(part, center, radius, eps):
    """(V_lo, V_hi, A_lo, A_hi) for a convex polytope P inscribed in the ball (center, radius).

    P lies inside the ball (convex hull of points on the sphere) and contains the ball of radius
    ``radius - eps`` if every face plane is at least that far from the centre, which is checked here.
    Volume and surface area are monotone for nested convex bodies (Cauchy's surface-area formula).
    """
    assert part.volume > 0 and part.is_convex
    offset = np.einsum("ij,ij->i", part.face_normals, part.triangles[:, 0] - center)
    assert offset.min() >= radius - eps * (1 + 1e-9)
    r0 = radius - eps
    return (4 / 3 * math.pi * r0**3, 4 / 3 * math.pi * radius**3, 4 * math.pi * r0**2, 4 * math.pi * radius**2)


@pytest.mark.parametrize("name", ["sphere", "hollow_shell", "shell_and_ball"])
def test_sphere_family_measures_bracketed(shapes, name):
    s = shapes[name]
    eps = s.facet_error
    p = s.params
    spheres = {  # (centre, radius, +1 solid ball / -1 cavity)
        "sphere": lambda: [((0, 0, 0), p["radius"], 1)],
        "hollow_shell": lambda: [((0, 0, 0), p["outer_radius"], 1), ((0, 0, 0), p["inner_radius"], -1)],
        "shell_and_ball": lambda: [((0, 0, 0), p["shell_radius"], 1), ((0, 0, 0), p["inner_radius"], -1),
                                   ((p["ball_center_x"], 0, 0), p["ball_radius"], 1)],
    }[name]()
    parts = merged(s.mesh).split(only_watertight=True)
    assert len(parts) == len(spheres)
    v_lo = v_hi = a_lo = a_hi = 0.0
    for part in parts:
        c = part.bounds.mean(axis=0)
        k = int(np.argmin([np.linalg.norm(c - np.array(sc)) + abs(np.ptp(part.vertices[:, 0]) / 2 - r)
                           for sc, r, _ in spheres]))
        center, radius, sign = spheres[k]
        assert np.sign(part.volume) == sign, "cavity walls are wound inward"
        if sign < 0:  # a fresh mesh: trimesh's in-place invert() leaves a stale convexity cache
            part = trimesh.Trimesh(part.vertices, part.faces[:, ::-1], process=False)
        vl, vh, al, ah = convex_part_bracket(part, np.array(center, float), radius, eps)
        v_lo, v_hi = (v_lo + vl, v_hi + vh) if sign > 0 else (v_lo - vh, v_hi - vl)
        a_lo, a_hi = a_lo + al, a_hi + ah
    assert v_lo <= s.volume_mesh <= v_hi
    assert a_lo <= s.area_mesh <= a_hi
    assert v_lo <= s.volume_exact <= v_hi and a_lo <= s.area_exact <= a_hi


def test_cylinder_measures_bracketed(shapes):
    # the n-gon prism lies inside the cylinder and contains the one of radius r - eps = r cos(pi/n)
    s = shapes["capped_cylinder"]
    r, h, eps = s.params["radius"], s.params["height"], s.facet_error
    np.testing.assert_allclose(eps, r * (1 - math.cos(math.pi / s.resolution["segments"])), rtol=1e-12)
    assert merged(s.mesh).is_convex
    r0 = r - eps
    assert math.pi * r0**2 * h <= s.volume_mesh <= math.pi * r**2 * h
    assert 2 * math.pi * r0 * (r0 + h) <= s.area_mesh <= 2 * math.pi * r * (r + h)


def test_torus_measures_closed_form(shapes):
    """Polyhedral torus of revolution: exact volume, bracketed area.

    Wedge between meridians phi_i, phi_i + dphi: the cross-section polygon Q swept along the straight chord between the two meridians
    has volume sin(dphi) * int_Q rho dA; summed, V = n_u sin(2pi/n_u) * R * area(Q) with
    area(Q) = n_v/2 r^2 sin(2pi/n_v) (regular polygon centred at rho = R).  So
    V_mesh = V_exact * sinc(2pi/n_u) * sinc(2pi/n_v).  Each planar trapezoid has area
    sinc(pi/n_u) * (h_j / L_j) times its frustum band, cos(pi/n_u) <= h_j / L_j <= 1, and the revolved
    polygon has area 2 pi R * perimeter(Q) (Pappus) = A_exact * sinc(pi/n_v).
    """
    s = shapes["torus"]
    nu, nv = s.resolution["major_segments"], s.resolution["minor_segments"]
    sinc = lambda x: math.sin(x) / x  # noqa: E731
    np.testing.assert_allclose(s.volume_mesh, s.volume_exact * sinc(2 * math.pi / nu) * sinc(2 * math.pi / nv),
                               rtol=1e-12)
    a_hi = s.area_exact * sinc(math.pi / nu) * sinc(math.pi / nv)
    assert a_hi * math.cos(math.pi / nu) <= s.area_mesh <= a_hi * (1 + 1e-12)
    # and the tube bound: the mesh lies within eps of the surface, so |dV| <= 2 eps A (Weyl tube, torus)
    assert abs(s.volume_mesh - s.volume_exact) <= 2 * s.facet_error * s.area_exact


def test_cauchy_mean_chord(shape):
    assert shape.cauchy_mean_chord == pytest.approx(4 * shape.volume_mesh / shape.area_mesh, rel=1e-15)
    p = shape.params
    # closed forms of 4V/S (Cauchy 1832; Santaló 1976): sphere 4R/3, torus 2r, box 2abc/(ab+bc+ca), cylinder 2rh/(r+h)
    expect = {
        "sphere": lambda: 4 * p["radius"] / 3,
        "torus": lambda: 2 * p["minor_radius"],
        "box": lambda: 2 * p["size_x"] * p["size_y"] * p["size_z"] / (
            p["size_x"] * p["size_y"] + p["size_y"] * p["size_z"] + p["size_z"] * p["size_x"]),
        "capped_cylinder": lambda: 2 * p["radius"] * p["height"] / (p["radius"] + p["height"]),
    }
    if shape.name in expect:
        assert shape.cauchy_mean_chord_exact == pytest.approx(expect[shape.name](), rel=1e-14)


# ---------------------------------------------------------------------------------------------
# Chords against an independent ray cast and root finder
# ---------------------------------------------------------------------------------------------


def test_normal_chord_against_ray_cast(shape):
    """normal_chord vs trimesh's float64 ray-triangle intersector on the merged mesh.

    Start points are sampled on the mesh and moved delta inward; the direction is the analytic normal
    at the point.  On every shape that ray is a normal line of the ideal surface where it leaves (it
    passes through the centre, the tube centre or the axis, or is perpendicular to a plane), so the
    mesh and ideal exits differ by at most facet_error along it.  delta exceeds the 1e-6 back-hit
    window of the intersector.
    """
    m = merged(shape.mesh)
    pts, face = trimesh.sample.sample_surface(m, 300, seed=7)
    normals = shape.surface_normal(pts)
    # near a hard edge the nearest ideal face can differ from the sampled facet's; keep the agreeing
    keep = np.einsum("ij,ij->i", normals, m.face_normals[face]) > 0.9
    assert keep.mean() > 0.95
    pts, normals = pts[keep], normals[keep]
    scale = scale_of(shape)
    origins = pts - 1e-5 * scale * normals
    loc, ray, _ = RayMeshIntersector(m).intersects_location(origins, -normals, multiple_hits=False)
    assert len(np.unique(ray)) == len(origins), "every inward ray hits the mesh"
    hit = np.full(len(origins), np.nan)
    hit[ray] = np.linalg.norm(loc - origins[ray], axis=1)
    expected = shape.normal_chord(origins, normals)
    tol = shape.facet_error + 1e-9 * scale
    assert np.nanmax(np.abs(hit - expected)) <= tol


def test_normal_chord_closed_values(shapes):
    s = shapes["sphere"]
    n = np.array([[0, 0, 1.0], [1, 0, 0], [0.6, 0, 0.8]])
    np.testing.assert_allclose(s.normal_chord(n * s.params["radius"], n), 2 * s.params["radius"], rtol=1e-14)
    t = shapes["torus"]
    R, r = t.params["major_radius"], t.params["minor_radius"]
    u, v = np.meshgrid(np.linspace(0, 2 * np.pi, 7), np.linspace(0, 2 * np.pi, 9))
    u, v = u.ravel(), v.ravel()
    nt = np.column_stack((np.cos(v) * np.cos(u), np.cos(v) * np.sin(u), np.sin(v)))
    pt = np.column_stack((R * np.cos(u), R * np.sin(u), np.zeros_like(u))) + r * nt
    np.testing.assert_allclose(t.normal_chord(pt, nt), 2 * r, rtol=1e-10)
    h = shapes["hollow_shell"]
    ro, ri = h.params["outer_radius"], h.params["inner_radius"]
    np.testing.assert_allclose(h.normal_chord(np.vstack((n * ro, n * ri)), np.vstack((n, -n))), ro - ri, rtol=1e-12)
    c = shapes["capped_cylinder"]
    rc, hc = c.params["radius"], c.params["height"]
    got = c.normal_chord([[rc, 0, 0.1], [0, -rc, -0.3], [0.1, 0.2, hc / 2], [0.3, 0, -hc / 2]],
                         [[1, 0, 0], [0, -1, 0], [0, 0, 1], [0, 0, -1]])
    np.testing.assert_allclose(got, [2 * rc, 2 * rc, hc, hc], rtol=1e-14)
    b = shapes["box"]
    a3 = np.array([b.params["size_x"], b.params["size_y"], b.params["size_z"]])
    got = b.normal_chord(np.diag(a3 / 2) * [[1], [1], [-1]] + [[0, 0.1, 0.05], [0.2, 0, 0.1], [0.3, -0.2, 0]],
                         np.diag([1.0, 1.0, -1.0]))
    np.testing.assert_allclose(got, a3, rtol=1e-14)


def test_l_block_piecewise_chords(shapes):
    """By construction of the L (foot [0, a] x [0, t1], wall [0, t2] x [0, b], centred): each face's
    straight-through extent."""
    s = shapes["l_block"]
    p = s.params
    a, b, d, t1, t2 = p["length"], p["height"], p["depth"], p["foot_thickness"], p["wall_thickness"]
    off = np.array([a, b, d]) / 2
    cases = [  # (point before centring, outward normal, chord)
        ((a / 2, t1 / 2, d), (0, 0, 1), d),
        ((t2 / 2, 0.9 * b, 0), (0, 0, -1), d),
        ((0, t1 / 2, d / 2), (-1, 0, 0), a),
        ((0, (t1 + b) / 2, d / 2), (-1, 0, 0), t2),
        ((a, t1 / 3, d / 3), (1, 0, 0), a),
        ((t2, (t1 + b) / 2, d / 2), (1, 0, 0), t2),
        ((t2 / 2, 0, d / 2), (0, -1, 0), b),
        (((t2 + a) / 2, 0, d / 2), (0, -1, 0), t1),
        (((t2 + a) / 2, t1, d / 2), (0, 1, 0), t1),
        ((t2 / 3, b, d / 4), (0, 1, 0), b),
    ]
    pts = np.array([c[0] for c in cases]) - off
    nrm = np.array([c[1] for c in cases], dtype=float)
    np.testing.assert_allclose(s.normal_chord(pts, nrm), [c[2] for c in cases], rtol=1e-14)
    np.testing.assert_allclose(s.surface_normal(pts), nrm, atol=0)


def test_sphere_ray_chord_is_2r_cos_theta(shapes):
    # elementary geometry: the chord at angle theta from the inward normal is 2R cos(theta)
    s = shapes["sphere"]
    R = s.params["radius"]
    rng = np.random.default_rng(3)
    n = rng.normal(size=(200, 3))
    n /= np.linalg.norm(n, axis=1, keepdims=True)
    d = rng.normal(size=(200, 3))
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    d = np.where((np.einsum("ij,ij->i", d, n) > 0)[:, None], -d, d)  # point inward
    cos_theta = -np.einsum("ij,ij->i", d, n)
    np.testing.assert_allclose(s.ray_chord(R * n, d), 2 * R * cos_theta, rtol=1e-12, atol=1e-14)


def test_torus_ray_chord_against_brentq(shapes):
    """Next crossing along tilted rays, against bracketing the implicit torus function with brentq."""
    s = shapes["torus"]
    R, r = s.params["major_radius"], s.params["minor_radius"]
    rng = np.random.default_rng(11)
    u, v = rng.uniform(0, 2 * np.pi, 40), rng.uniform(0, 2 * np.pi, 40)
    n = np.column_stack((np.cos(v) * np.cos(u), np.cos(v) * np.sin(u), np.sin(v)))
    p = np.column_stack((R * np.cos(u), R * np.sin(u), np.zeros(40))) + r * n
    # directions within 60 deg of the inward normal
    t1 = np.cross(n, [0.3, 0.5, 0.8])
    t1 /= np.linalg.norm(t1, axis=1, keepdims=True)
    t2 = np.cross(n, t1)
    theta, psi = np.arccos(rng.uniform(0.5, 1.0, 40)), rng.uniform(0, 2 * np.pi, 40)
    d = -np.cos(theta)[:, None] * n + np.sin(theta)[:, None] * (np.cos(psi)[:, None] * t1 + np.sin(psi)[:, None] * t2)
    got = s.ray_chord(p, d)

    def f(t, o, w):
        x = o + t * w
        return (x @ x + R * R - r * r) ** 2 - 4 * R * R * (x[0] ** 2 + x[1] ** 2)

    for k in range(len(p)):  # 40 independent root searches
        ts = np.linspace(1e-7, 2 * (R + r), 20001)
        x = p[k] + ts[:, None] * d[k]
        vals = (np.einsum("ij,ij->i", x, x) + R * R - r * r) ** 2 - 4 * R * R * (x[:, 0] ** 2 + x[:, 1] ** 2)
        assert vals[0] < 0, "inward ray starts inside"
        j = int(np.argmax(vals > 0))
        root = optimize.brentq(f, ts[j - 1], ts[j], args=(p[k], d[k]), xtol=1e-14, rtol=4 * EPS)
        assert got[k] == pytest.approx(root, abs=1e-10)


def test_chord_input_validation(shapes):
    s = shapes["sphere"]
    with pytest.raises(ValueError, match="normals"):
        s.normal_chord(np.zeros((3, 3)), np.zeros((2, 3)))
    with pytest.raises(ValueError, match="points"):
        s.normal_chord(np.zeros(3), np.zeros(3))


# ---------------------------------------------------------------------------------------------
# Sphere cone closed forms against numerical integration
# ---------------------------------------------------------------------------------------------


def lobe_weight(lobe, mu):
    return mu if lobe == "cosine" else 1.0


def quad_mean(g, R, alpha, lobe):
    """E[g(mu)] under the lobe, by quad over mu = cos(theta) on [cos(alpha), 1] (dOmega = dmu dphi)."""
    c = math.cos(alpha)
    num, en = integrate.quad(lambda mu: g(mu) * lobe_weight(lobe, mu), c, 1, epsabs=0, epsrel=1e-13)
    den, ed = integrate.quad(lambda mu: lobe_weight(lobe, mu), c, 1, epsabs=0, epsrel=1e-13)
    value = num / den
    return value, (en + abs(value) * ed) / den  # first-order propagation of quad's error estimates


def close_to_quad(closed, value, err):
    return abs(closed - value) <= err + 64 * EPS * abs(value)


@pytest.mark.parametrize("lobe", ["cosine", "uniform"])
@pytest.mark.parametrize("alpha", [1e-3, 0.2, 0.7, 1.0, 1.3, math.pi / 2])
@pytest.mark.parametrize("R", [0.35, 1.7])
def test_cone_chord_moments_against_quad(lobe, alpha, R):
    m1, e1 = quad_mean(lambda mu: 2 * R * mu, R, alpha, lobe)
    m2, e2 = quad_mean(lambda mu: (2 * R * mu) ** 2, R, alpha, lobe)
    assert close_to_quad(S.sphere_cone_mean_chord(R, alpha, lobe), m1, e1)
    assert close_to_quad(S.sphere_cone_chord_second_moment(R, alpha, lobe), m2, e2)


@pytest.mark.parametrize("lobe", ["cosine", "uniform"])
def test_cone_mean_chord_against_dblquad_over_solid_angle(lobe):
    # the defining integral over the cone's solid angle, in (theta, phi), without the mu substitution
    R, alpha = 1.7, 1.0
    w = (lambda th: math.cos(th)) if lobe == "cosine" else (lambda th: 1.0)
    num, en = integrate.dblquad(lambda th, ph: 2 * R * math.cos(th) * w(th) * math.sin(th), 0, 2 * math.pi, 0, alpha,
                                epsabs=0, epsrel=1e-12)
    den, ed = integrate.dblquad(lambda th, ph: w(th) * math.sin(th), 0, 2 * math.pi, 0, alpha, epsabs=0, epsrel=1e-12)
    value = num / den
    assert close_to_quad(S.sphere_cone_mean_chord(R, alpha, lobe), value, (en + value * ed) / den)


def test_references_check_values_recomputed():
    # computed check values (numerical quadrature), recomputed here with quad (12 printed decimals: +-5e-13)
    R = 1.7
    for lobe, printed in (("cosine", 2.696257825099), ("uniform", 2.618513919976)):
        value, err = quad_mean(lambda mu: 2 * R * mu, R, 1.0, lobe)
        assert abs(value - printed) <= 5e-13 + err
        assert abs(S.sphere_cone_mean_chord(R, 1.0, lobe) - printed) <= 5e-13 + 64 * EPS * printed
    for lobe, printed in (("cosine", 0.147605123214), ("uniform", 0.284301979423)):
        value, err = quad_mean(lambda mu: math.exp(-2 * R * mu), R, math.pi / 2, lobe)
        assert abs(value - printed) <= 5e-13 + err
        assert abs(S.sphere_cone_mean_transmittance(R, math.pi / 2, lobe, 1.0) - printed) <= 5e-13


@pytest.mark.parametrize("lobe", ["cosine", "uniform"])
@pytest.mark.parametrize("alpha", [1e-4, 0.05, 0.5, 1.0, math.pi / 2])
@pytest.mark.parametrize("sigma", [1e-7, 0.01, 0.3, 1.0, 8.0])
def test_cone_transmittance_against_quad(lobe, alpha, sigma):
    R = 1.3  # x = 2 sigma R (1 - cos alpha) spans 1e-15 .. 21, both sides of the series switch at 0.1
    value, err = quad_mean(lambda mu: math.exp(-2 * sigma * R * mu), R, alpha, lobe)
    assert close_to_quad(S.sphere_cone_mean_transmittance(R, alpha, lobe, sigma), value, err)


def test_cone_limits():
    R, tau = 0.9, 0.6
    sigma = tau / (2 * R)
    for lobe in ("cosine", "uniform"):
        assert S.sphere_cone_mean_chord(R, 0.0, lobe) == pytest.approx(2 * R, rel=1e-15)
        assert S.sphere_cone_chord_second_moment(R, 0.0, lobe) == pytest.approx(4 * R * R, rel=1e-15)
        assert S.sphere_cone_mean_transmittance(R, 0.0, lobe, sigma) == pytest.approx(math.exp(-tau), rel=1e-15)
        assert S.sphere_cone_mean_transmittance(R, 0.8, lobe, 0.0) == 1.0
    # hemisphere: closed forms 4R/3, R, 2R^2, (1 - e^-tau)/tau, 2[1 - (1 + tau)e^-tau]/tau^2
    h = math.pi / 2
    assert S.sphere_cone_mean_chord(R, h, "cosine") == pytest.approx(4 * R / 3, rel=1e-15)
    assert S.sphere_cone_mean_chord(R, h, "uniform") == pytest.approx(R, rel=1e-15)
    assert S.sphere_cone_chord_second_moment(R, h, "cosine") == pytest.approx(2 * R * R, rel=1e-15)
    assert S.sphere_cone_mean_transmittance(R, h, "uniform", sigma) == pytest.approx(-math.expm1(-tau) / tau, rel=1e-14)
    assert S.sphere_cone_mean_transmittance(R, h, "cosine", sigma) == pytest.approx(
        2 * (1 - (1 + tau) * math.exp(-tau)) / tau**2, rel=1e-13)
    # arrays broadcast
    out = S.sphere_cone_mean_chord(np.array([1.0, 2.0]), np.array([0.0, 0.0]), "uniform")
    np.testing.assert_allclose(out, [2.0, 4.0])


def test_cone_argument_errors():
    # an unknown lobe raises as everywhere else (thickbake.lobes.lobe_named), in each closed form
    for form in (S.sphere_cone_mean_chord, S.sphere_cone_chord_second_moment):
        with pytest.raises(ThickbakeError, match="unknown lobe 'lambert'"):
            form(1.0, 0.5, "lambert")
    with pytest.raises(ThickbakeError, match="unknown lobe 'lambert'"):
        S.sphere_cone_mean_transmittance(1.0, 0.5, "lambert", 1.0)
    with pytest.raises(ValueError, match="cone_half_angle_rad"):
        S.sphere_cone_mean_chord(1.0, 2.0, "cosine")
    with pytest.raises(ValueError, match="sigma"):
        S.sphere_cone_mean_transmittance(1.0, 0.5, "cosine", -1.0)


def test_cone_forms_follow_the_lobe_objects():
    # The closed forms are reached through the lobe object (thickbake.lobes) and must agree with that
    # lobe's own polar density: E[l] = 2R E[cos θ] with cos θ weighted by Lobe.polar_weight on [c, 1].
    # Midpoint rule with n nodes: exact for the normaliser (weight 1 or x, linear) and off by at most
    # (1 - c) h² max|f''| / 24 ≤ h² / 12 for the numerator x^(p+1), h = (1 - c) / n ≤ 1e-5, so a
    # relative 1e-9 is far outside the quadrature error and far inside any wrong form.
    R, n = 1.3, 100_000
    for lobe in LOBES.values():
        for alpha in (0.3, 1.0, math.pi / 2):
            c = math.cos(alpha)
            edges = np.linspace(c, 1.0, n + 1)
            x = 0.5 * (edges[:-1] + edges[1:])
            weight = lobe.polar_weight(x)
            expected = 2 * R * float((weight * x).sum() / weight.sum())
            assert S.sphere_cone_mean_chord(R, alpha, lobe) == S.sphere_cone_mean_chord(R, alpha, lobe.name)
            assert S.sphere_cone_mean_chord(R, alpha, lobe) == pytest.approx(expected, rel=1e-9)

    class ConeOfOtherDensity(Lobe):
        name = "other"

    with pytest.raises(ThickbakeError, match="no closed form"):
        S.sphere_cone_mean_chord(1.0, 0.5, ConeOfOtherDensity())


# ---------------------------------------------------------------------------------------------
# Files
# ---------------------------------------------------------------------------------------------


def load_glb_mesh(path):
    scene = trimesh.load(path, process=False)
    assert isinstance(scene, trimesh.Scene) and len(scene.geometry) == 1
    (name, mesh), = scene.geometry.items()
    np.testing.assert_array_equal(scene.graph.get(scene.graph.nodes_geometry[0])[0], np.eye(4))
    return name, mesh


def test_write_shape_set_round_trips(shapes, tmp_path):
    chosen = [shapes[n] for n in NAMES[:6]]
    paths = S.write_shape_set(tmp_path, chosen)
    expected_names = {f"{s.name}.{ext}" for s in chosen for ext in ("obj", "glb")} | {"expected.json"}
    assert {p.name for p in paths} == expected_names
    assert {p.name for p in tmp_path.iterdir()} == expected_names, "no temporary files left behind"
    doc = json.loads((tmp_path / "expected.json").read_text())
    for s in chosen:
        rec = doc["shapes"][s.name]
        assert rec["params"] == s.params and rec["facet_error"] == s.facet_error
        assert rec["volume_mesh"] == s.volume_mesh and rec["cauchy_mean_chord"] == s.cauchy_mean_chord
        assert rec["normal_chord"] == s.sources["normal_chord"] and rec["sources"] == s.sources
        assert rec["n_uv_islands"] >= 2

        uv, vn, v = s.mesh.visual.uv, s.mesh.vertex_normals, s.mesh.vertices
        obj = trimesh.load(tmp_path / f"{s.name}.obj", process=False)
        assert len(obj.vertices) == len(v)
        np.testing.assert_array_equal(obj.faces, s.mesh.faces)
        # OBJ is written with 10 decimals: rounding is at most 5e-11 per number
        np.testing.assert_allclose(obj.visual.uv, uv, rtol=0, atol=5.1e-11)
        np.testing.assert_allclose(obj.vertex_normals, vn, rtol=0, atol=1e-10)  # re-normalised on load
        np.testing.assert_allclose(obj.vertices, v, rtol=0, atol=5.1e-11)

        name, glb = load_glb_mesh(tmp_path / f"{s.name}.glb")
        assert name == s.name and len(glb.vertices) == len(v)
        np.testing.assert_array_equal(glb.faces, s.mesh.faces)
        # glTF stores float32 and 1 - v; trimesh flips v back.  Rounding <= F32 per value (<= 1).
        np.testing.assert_allclose(glb.visual.uv, uv, rtol=0, atol=2 * F32)
        np.testing.assert_allclose(glb.vertex_normals, vn, rtol=0, atol=2 * F32)
        np.testing.assert_allclose(glb.vertices, v, rtol=0, atol=F32 * np.abs(v).max())
        for loaded in (obj, glb):
            assert merged(loaded).is_watertight


def test_atomic_write_keeps_old_file_on_failure(tmp_path, monkeypatch):
    target = tmp_path / "x.json"
    target.write_bytes(b"old")

    def broken(src, dst):
        raise OSError("disk full")

    monkeypatch.setattr(S.os, "replace", broken)
    with pytest.raises(OSError):
        S.atomic_write_bytes(target, b"new")
    assert target.read_bytes() == b"old"
    assert [p.name for p in tmp_path.iterdir()] == ["x.json"]


# ---------------------------------------------------------------------------------------------
# Demo assets in samples/ (written by scripts/make_samples.py)
# ---------------------------------------------------------------------------------------------


def test_sample_generator_reproduces_the_committed_bytes(tmp_path):
    """scripts/make_samples.py promises identical bytes on every run: the committed samples must be
    what it writes (a drift, e.g. a "-0.0000000" that flips sign between numpy builds, fails here)."""
    import subprocess
    import sys

    script = SAMPLES.parent / "scripts" / "make_samples.py"
    subprocess.run([sys.executable, str(script), "--out", str(tmp_path)], check=True, capture_output=True)
    written = sorted(p.relative_to(tmp_path).as_posix() for p in tmp_path.rglob("*") if p.is_file())
    assert {"candle.glb", "garden/leaf.obj", "garden/pebble.obj"} <= set(written)
    for rel in written:
        assert (tmp_path / rel).read_bytes() == (SAMPLES / rel).read_bytes(), rel


@pytest.mark.parametrize("rel", ["candle.glb", "garden/leaf.obj", "garden/pebble.obj"])
def test_sample_assets_are_closed_and_mapped(rel):
    path = SAMPLES / rel
    if not path.exists():
        pytest.skip(f"{path} not generated; run python scripts/make_samples.py")
    assert path.stat().st_size < 300_000
    mesh = load_glb_mesh(path)[1] if path.suffix == ".glb" else trimesh.load(path, process=False)
    m = merged(mesh)
    assert m.is_watertight and m.is_winding_consistent and m.volume > 0
    assert not mesh.is_watertight, "split at UV seams"
    uv = mesh.visual.uv
    assert uv.min() >= 0 and uv.max() <= 1
    assert S.uv_islands(mesh).max() + 1 >= 2
    assert rasterise_count(uv[mesh.faces], 256).max() == 1
    assert mesh.area_faces.min() > 0
