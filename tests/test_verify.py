"""``thickbake verify``: closed forms against independent integration, the analytic run, and asset checks.

Sources beside each check: the cone formulas are our own derivation (stated in thickbake.checks.verify)
and are checked here against scipy.integrate over the polar angle; Cauchy's mean chord 4V/S is
A. Cauchy (1832) / L. A. Santaló, *Integral Geometry and Geometric Probability* (1976), and for
non-convex bodies with every chord segment counted Mazzolo, Roesslinger & Gille, J. Math. Phys.
44:6195 (2003) — from memory.
"""

import json
import math

import numpy as np
import pytest
import trimesh
from scipy import integrate, stats

from thickbake.checks import shapes
from thickbake.cli.main import main
from thickbake.pipeline.load import load_asset
from thickbake.checks.meshcheck import face_orientation, front_face_hits
from thickbake.checks.coverage import _clip_moments, exact_texel_coverage
from thickbake.checks.error_budget import bonferroni_k, measure_value, sphere_cone_expected, sphere_systematic_bound
from thickbake.pipeline.trace import make_engine
from thickbake.checks.verify import VERIFY_DEFAULTS


def run_verify(capsys, *args):
    """``thickbake verify ARGS --json -`` through the real entry point: (exit code, report as JSON, stderr)."""
    code = main(["verify", *map(str, args), "--json", "-"])
    out = capsys.readouterr()
    return code, (json.loads(out.out) if out.out else None), out.err


def status(doc, subject, quantity):
    """Status of the row (subject, quantity) of a verify report."""
    found = [c["status"] for c in doc["checks"] if c["subject"] == subject and c["quantity"] == quantity]
    assert len(found) == 1, (subject, quantity, [(c["subject"], c["quantity"]) for c in doc["checks"]])
    return found[0]


def note(doc, subject, quantity):
    return next(c["note"] for c in doc["checks"] if c["subject"] == subject and c["quantity"] == quantity)


# ---------------------------------------------------------------------------- closed forms
def _by_quadrature(R, alpha, lobe, measure, reach, L):
    """Independent check: integrate g(2R cos θ) over the cone in θ with scipy.integrate.quad.

    Solid angle dΩ = sin θ dθ dφ; cosine lobe weight cos θ, uniform weight 1 (our derivation).
    """
    weight = (lambda t: math.cos(t)) if lobe == "cosine" else (lambda t: 1.0)
    breaks = []
    if reach < 2 * R:
        breaks = [math.acos(reach / (2 * R))]
    breaks = [b for b in breaks if 0 < b < alpha]
    g = lambda t: float(measure_value(2 * R * math.cos(t), measure, reach, L))  # noqa: E731
    num = integrate.quad(lambda t: g(t) * weight(t) * math.sin(t), 0, alpha, points=breaks or None,
                         epsabs=1e-13, epsrel=1e-12, limit=200)[0]
    den = integrate.quad(lambda t: weight(t) * math.sin(t), 0, alpha, epsabs=1e-14, epsrel=1e-13)[0]
    return num / den


@pytest.mark.parametrize("measure", ["thickness", "transmittance", "occlusion"])
@pytest.mark.parametrize("lobe", ["cosine", "uniform"])
@pytest.mark.parametrize("alpha,reach", [(math.pi / 2, 10.0), (1.0, 10.0), (math.pi / 2, 2.1), (0.4, 3.3),
                                         (0.05, 3.0), (1.3, 0.9)])
def test_sphere_cone_closed_form_against_quad(measure, lobe, alpha, reach):
    # our own derivation (thickbake.checks.verify docstring) vs scipy.integrate.quad in θ; the quadrature
    # is good to ~1e-12, so 1e-9 relative leaves three orders of magnitude
    R, L = 1.7, 0.8
    expected = _by_quadrature(R, alpha, lobe, measure, reach, L)
    got = sphere_cone_expected(R, alpha, lobe, measure, reach, L)
    assert got == pytest.approx(expected, rel=1e-9, abs=1e-12)


def test_sphere_closed_form_narrow_cone_limit():
    # α → 0 tends to the along-normal value 2R (elementary geometry), without a 0/0 in the closed form
    assert sphere_cone_expected(1.0, 1e-6, "cosine", "thickness", 9.0) == pytest.approx(2.0, abs=1e-9)
    assert sphere_cone_expected(1.0, 1e-6, "uniform", "thickness", 9.0) == pytest.approx(2.0, abs=1e-9)


@pytest.mark.parametrize("make", [shapes.box, shapes.l_block])
def test_cauchy_mean_chord_by_quasi_monte_carlo(make):
    # Cauchy (1832) / Santaló (1976) for the box; Mazzolo, Roesslinger & Gille (2003, from memory)
    # for the non-convex L-block (each segment its own chord).  Independent numerical integration:
    # points uniform by area, cosine directions (scipy.stats.qmc Sobol, 2^16), exact slab chords.
    shape = make()
    mesh = shape.mesh
    u = stats.qmc.Sobol(d=4, scramble=True, rng=np.random.default_rng(7)).random_base2(16)
    area = mesh.area_faces
    cdf = np.cumsum(area) / area.sum()
    face = np.minimum(np.searchsorted(cdf, u[:, 0]), len(area) - 1)
    lo = np.where(face > 0, cdf[np.maximum(face - 1, 0)], 0.0)
    s = (u[:, 0] - lo) / (cdf[face] - lo)
    t = u[:, 1]
    r1 = np.sqrt(s)
    tri = mesh.triangles[face]
    points = (1 - r1)[:, None] * tri[:, 0] + (r1 * (1 - t))[:, None] * tri[:, 1] + (r1 * t)[:, None] * tri[:, 2]
    normal = mesh.face_normals[face]
    sin_t, phi = np.sqrt(u[:, 2]), 2 * np.pi * u[:, 3]
    cos_t = np.sqrt(1 - u[:, 2])
    a = np.where(np.abs(normal[:, :1]) < 0.9, [[1.0, 0, 0]], [[0, 1.0, 0]])
    t1 = np.cross(normal, a)
    t1 /= np.linalg.norm(t1, axis=1, keepdims=True)
    t2 = np.cross(normal, t1)
    d = -cos_t[:, None] * normal + (sin_t * np.cos(phi))[:, None] * t1 + (sin_t * np.sin(phi))[:, None] * t2
    chord = shape.ray_chord(points - 1e-9 * normal, d)
    ok = np.isfinite(chord)
    assert ok.mean() > 0.9999
    mean = chord[ok].mean()
    se = chord[ok].std() / math.sqrt(ok.sum())  # iid standard error over-states a scrambled Sobol error
    assert abs(mean - shape.cauchy_mean_chord) < 4 * se


def test_bonferroni_factor_against_scipy():
    # Bonferroni: n texels each at two-sided α/n; the normal limit of the Student-t quantile
    k = bonferroni_k(10_000, 10**6)
    assert 2 * stats.norm.sf(k) * 10_000 == pytest.approx(1e-3, rel=1e-3)
    assert bonferroni_k(10, 0) == 0.0


def test_sphere_bound_covers_faceted_chords():
    # the per-ray bound e(x) integrated over the lobe must cover the true faceted-sphere error; check it
    # against exact ray chords of the polyhedron (trimesh ray casting on the default sphere mesh)
    sphere = shapes.sphere(segments=24)
    R, facet = 1.0, sphere.facet_error
    bound = sphere_systematic_bound(R, 0.0, "cosine", "thickness", 10.0, None, facet, 0.0)
    assert bound == pytest.approx(2 * facet)
    asset = load_asset(sphere.mesh)
    engine = make_engine(asset.trace_vertices, asset.trace_faces)
    rng = np.random.default_rng(3)
    face = rng.integers(len(asset.triangles), size=4000)
    r = rng.random((4000, 2))
    r[r.sum(1) > 1] = 1 - r[r.sum(1) > 1]
    tri = asset.triangles[face]
    p = tri[:, 0] + r[:, :1] * (tri[:, 1] - tri[:, 0]) + r[:, 1:] * (tri[:, 2] - tri[:, 0])
    n = p / np.linalg.norm(p, axis=1, keepdims=True)
    dist, hit = engine.first_hit((p - 1e-6 * n).astype(np.float32), (-n).astype(np.float32), 10.0)
    assert hit.all()
    assert np.abs(dist + 1e-6 - 2 * R).max() <= bound + 1e-5


# ---------------------------------------------------------------------------- quadrature helpers
def test_clip_moments_exact_cases():
    # Green's theorem clip: a triangle covering the square's lower-left half, and a triangle containing
    # the square entirely (area 1, centroid at its centre)
    half = np.array([[[0.0, 0.0], [1.0, 0.0], [0.0, 1.0]]])
    m = _clip_moments(half, np.array([0.0]), np.array([0.0]))
    assert m[0] == pytest.approx([0.5, 1 / 6, 1 / 6])
    big = np.array([[[-10.0, -10.0], [30.0, -10.0], [-10.0, 30.0]]])
    m = _clip_moments(big, np.array([2.0]), np.array([3.0]))
    assert m[0] == pytest.approx([1.0, 2.5, 3.5])


def test_exact_coverage_sums_to_surface_area():
    shape = shapes.capped_cylinder(segments=16)
    asset = load_asset(shape.mesh)
    cov = exact_texel_coverage(asset, 64, 48)
    assert cov.area.sum() == pytest.approx(asset.report.area, rel=1e-12)
    assert np.allclose(cov.face_covered, cov.face_area, rtol=1e-9)


# ---------------------------------------------------------------------------- mesh checks
def _rebuild(mesh, faces):
    return trimesh.Trimesh(mesh.vertices, faces, vertex_normals=mesh.vertex_normals,
                           visual=trimesh.visual.TextureVisuals(uv=mesh.visual.uv), process=False)


def flipped_sphere():
    mesh = shapes.sphere(segments=48).mesh
    faces = mesh.faces.copy()
    cap = mesh.triangles_center[:, 2] > 0.8
    faces[cap] = faces[cap][:, ::-1]
    return _rebuild(mesh, faces), int(cap.sum())


def holed_sphere():
    mesh = shapes.sphere(segments=48).mesh
    keep = mesh.triangles_center[:, 2] < 0.95
    return _rebuild(mesh, mesh.faces[keep])


def test_orientation_finds_flipped_patch_and_inverted_part_but_not_a_cavity():
    mesh, flipped = flipped_sphere()
    asset = load_asset(mesh)
    report = face_orientation(asset.trace_vertices, asset.trace_faces,
                              make_engine(asset.trace_vertices, asset.trace_faces))
    assert len(report.wrong_faces) == flipped and report.conflicts == 0
    # a hollow shell's inner wall faces the cavity by design: not inside-out (ray parity, not volume sign)
    shell = load_asset(shapes.hollow_shell(segments=24).mesh)
    report = face_orientation(shell.trace_vertices, shell.trace_faces,
                              make_engine(shell.trace_vertices, shell.trace_faces))
    assert report.parts == 2 and len(report.wrong_faces) == 0
    # a separate part wound inside-out as a whole is found
    both = shapes.shell_and_ball(shell_segments=24, ball_segments=24).mesh
    ball = both.vertices[both.faces].mean(axis=1)[:, 0] > 1.1
    faces = both.faces.copy()
    faces[ball] = faces[ball][:, ::-1]
    asset = load_asset(_rebuild(both, faces))
    report = face_orientation(asset.trace_vertices, asset.trace_faces,
                              make_engine(asset.trace_vertices, asset.trace_faces))
    assert report.inside_out_parts == 1 and len(report.wrong_faces) == int(ball.sum())


def test_front_face_hits_zero_on_clean_shapes():
    # on a closed outward mesh an inward ray always leaves through a back face
    for shape in (shapes.torus(major_segments=32, minor_segments=16), shapes.l_block()):
        asset = load_asset(shape.mesh)
        hits = front_face_hits(asset, make_engine(asset.trace_vertices, asset.trace_faces), rays=8192)
        assert hits.front == 0 and hits.missed == 0


# ---------------------------------------------------------------------------- the command
def test_verify_defaults_pass(capsys, tmp_path):
    # (its run time is reported in README with the command that measures it, not asserted here)
    code, doc, err = run_verify(capsys)
    assert code == 0, err
    names = {s.name for s in shapes.analytic_set()}
    assert {c["subject"] for c in doc["checks"]} == names
    cauchy = [c for c in doc["checks"] if c["quantity"] == "Cauchy mean chord 4V/S"]
    assert {c["subject"] for c in cauchy} == names and all(c["status"] == "PASS" for c in cauchy)
    assert status(doc, "sphere", "per texel, cone closed form") == "PASS"
    along = [c for c in doc["checks"] if c["quantity"] == "per texel, along the normal"]
    assert len(along) == len(names) - 1 and all(c["status"] == "skip" for c in along)
    assert doc["passed"] is True and doc["verdict"] == "all checks passed"
    assert doc["settings"]["size"] == [VERIFY_DEFAULTS["size"]] * 2
    assert doc["settings"]["rays"] == VERIFY_DEFAULTS["rays"]
    # every passing row holds its figures within its own tolerance
    for c in doc["checks"]:
        if c["status"] == "PASS" and c["quantity"] == "Cauchy mean chord 4V/S":
            assert abs(c["measured"] - c["expected"]) <= c["tolerance"]


def test_verify_json_file_and_table(capsys, tmp_path):
    # --json FILE writes the same report as a file and still prints the table
    out_json = tmp_path / "verify.json"
    code = main(["verify", "--shapes", "box", "--size", "64", "--rays", "16", "--json", str(out_json)])
    printed = capsys.readouterr().out
    assert code == 0
    doc = json.loads(out_json.read_text())
    assert [c["subject"] for c in doc["checks"]] == ["box", "box"]
    assert doc["verdict"] in printed
    assert sorted(p.name for p in tmp_path.iterdir()) == ["verify.json"]


def test_verify_along_the_normal(capsys):
    code, doc, err = run_verify(capsys, "--cone", "0", "--size", "96")
    assert code == 0, err
    along = [c for c in doc["checks"] if c["quantity"] == "per texel, along the normal"]
    assert len(along) == 5 and all(c["status"] == "PASS" for c in along)
    assert status(doc, "sphere", "per texel, cone closed form") == "PASS"
    assert all(c["status"] == "skip" for c in doc["checks"] if c["quantity"] == "Cauchy mean chord 4V/S")


def test_verify_sphere_transmittance_uniform_cone(capsys):
    code, doc, err = run_verify(capsys, "--shapes", "sphere", "--size", "96", "--measure", "transmittance",
                                "--lobe", "uniform", "--cone", "40")
    assert code == 0, err
    assert status(doc, "sphere", "per texel, cone closed form") == "PASS"
    assert status(doc, "sphere", "Cauchy mean chord 4V/S") == "skip"


def test_verify_fails_with_one_random_ray(capsys):
    code, doc, _ = run_verify(capsys, "--shapes", "sphere", "--size", "96", "--rays", "1", "--sequence", "random")
    assert code == 1 and doc["passed"] is False
    assert status(doc, "sphere", "per texel, cone closed form") == "FAIL"
    assert "cannot estimate its noise" in note(doc, "sphere", "per texel, cone closed form")
    assert doc["verdict"].startswith("1 check failed")


def test_verify_fails_without_bias(capsys):
    code, doc, _ = run_verify(capsys, "--shapes", "sphere,box", "--size", "96", "--bias", "0")
    assert code == 1 and doc["passed"] is False
    assert status(doc, "sphere", "per texel, cone closed form") == "FAIL"
    assert status(doc, "sphere", "Cauchy mean chord 4V/S") == "FAIL"
    # (the box's rays start exactly on axis-aligned faces; whether they hit their own triangle then
    # depends on the scene's arithmetic, so its row is not asserted)
    assert any("bias 0 lets rays hit the triangle they start on" in c["note"] for c in doc["checks"])


def test_verify_asset_clean_flipped_and_holed(capsys, tmp_path):
    clean = tmp_path / "clean.obj"
    clean.write_bytes(shapes.obj_bytes(shapes.sphere(segments=48).mesh))
    code, doc, err = run_verify(capsys, clean, "--size", "128", "--rays", "32")
    assert code == 0, err
    assert doc["mode"] == "asset" and doc["verdict"].startswith("fit for baking")

    flipped = tmp_path / "flipped.obj"
    mesh, count = flipped_sphere()
    flipped.write_bytes(shapes.obj_bytes(mesh))
    code, doc, _ = run_verify(capsys, flipped, "--size", "128", "--rays", "32", "--cone", "10")
    assert code == 1
    assert status(doc, "flipped.obj", "faces wound outward") == "FAIL"
    assert status(doc, "flipped.obj", "Cauchy mean chord 4V/S") == "FAIL"
    wound = next(c for c in doc["checks"] if c["quantity"] == "faces wound outward")
    assert f"{count:,} of" in wound["note"] and "point inward" in wound["note"]
    assert "(overrides your --cone)" in json.dumps(doc)
    assert doc["verdict"].startswith("not fit for baking: ")

    holed = tmp_path / "holed.obj"
    holed.write_bytes(shapes.obj_bytes(holed_sphere()))
    code, doc, _ = run_verify(capsys, holed, "--size", "128", "--rays", "32")
    assert code == 1
    asset = load_asset(holed)
    assert status(doc, "holed.obj", "closed surface") == "FAIL"
    assert f"close the holes: {asset.report.boundary_edges:,} open edges" in note(doc, "holed.obj", "closed surface")
    assert status(doc, "holed.obj", "Cauchy mean chord 4V/S") == "FAIL"


def test_verify_user_errors(capsys, tmp_path):
    code, _, err = run_verify(capsys, "--shapes", "teapot")
    assert code == 2 and "unknown shape 'teapot'" in err and len(err.strip().splitlines()) == 1
    code, _, err = run_verify(capsys, tmp_path / "missing.obj")
    assert code == 2 and "no such file" in err
    (tmp_path / "box.obj").write_bytes(shapes.obj_bytes(shapes.box().mesh))
    code, _, err = run_verify(capsys, tmp_path / "box.obj", "--shapes", "sphere")
    assert code == 2 and "--shapes applies" in err
    (tmp_path / "out").mkdir()
    code = main(["verify", "--json", str(tmp_path / "out"), "--shapes", "box"])
    err = capsys.readouterr().err
    assert code == 2 and "folder" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["box.obj", "out"]
