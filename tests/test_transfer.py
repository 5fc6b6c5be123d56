"""Bakes from a source solid onto a target's UVs (thickbake.pipeline.transfer).

The target is a coarse icosphere (trimesh.creation.icosphere(subdivisions=1): 80 faces, vertices on the
sphere of radius R) given a per-face UV layout here: face k gets its own cell of a grid, with corners
at 1/8 and 7/8 of the cell, so no two faces share a texel and the texel → surface point map is known
in closed form.  Its vertex normals are radial.  The source is the package's finely tessellated UV
sphere of the same radius (thickbake.checks.shapes.sphere, 192 segments), which needs no UVs here.
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
import trimesh

import thickbake
from thickbake.checks import shapes
from thickbake.errors import ThickbakeError
from thickbake.pipeline.load import load_asset
from thickbake.constants import SEARCH_DIAGONAL_FRACTION

R = 1.0
SIZE = 128
#: Corners of a face's UV triangle inside its grid cell (cell units).
CORNERS = np.array([[1 / 8, 1 / 8], [7 / 8, 1 / 8], [1 / 8, 7 / 8]])


def per_face_target(triangles: np.ndarray, cells: int, first_cell: int = 0, centre=(0.0, 0.0, 0.0)) -> trimesh.Trimesh:
    """A mesh of the given (f, 3, 3) triangles, face k in UV cell ``first_cell + k`` of a cells × cells grid.

    Vertices are split per face (the loader welds them for tracing); normals point away from ``centre``."""
    f = len(triangles)
    k = first_cell + np.arange(f)
    cell = np.stack([k % cells, k // cells], axis=1)
    uv = (cell[:, None, :] + CORNERS[None]) / cells
    vertices = triangles.reshape(-1, 3)
    radial = vertices - np.asarray(centre, np.float64)
    normals = radial / np.linalg.norm(radial, axis=1, keepdims=True)
    return trimesh.Trimesh(vertices, np.arange(3 * f).reshape(-1, 3), vertex_normals=normals, process=False,
                           visual=trimesh.visual.TextureVisuals(uv=uv.reshape(-1, 2)))


def icosphere_triangles(radius: float = R) -> np.ndarray:
    ico = trimesh.creation.icosphere(subdivisions=1, radius=radius)
    return ico.vertices[ico.faces]


@pytest.fixture(scope="module")
def source():
    return shapes.sphere(radius=R, segments=192)


@pytest.fixture(scope="module")
def target():
    return per_face_target(icosphere_triangles(), cells=9)


def f32_slack(diagonal: float) -> float:
    """8 float32 ulps of a coordinate the size of the bounding box (ray origins are float32)."""
    return 8 * float(np.spacing(np.float32(diagonal)))


def normal_chord_band(source_shape) -> tuple[float, float]:
    """Where a chord along the source's shading normal must lie, with --cone 0.

    The shading normal at a point p of a source facet is parallel to p itself (p = Σ bᵢvᵢ with radial
    vertex normals vᵢ/R), so the ray passes through the centre: chord = |p| + |exit point|, and both
    points lie between the spheres of radius R − δ and R, δ the facet bound of the tessellation
    (thickbake.checks.shapes facet_error, 2R(1 − cos(π/segments))).  Hence 2R − 2δ ≤ chord ≤ 2R (R the
    source's radius), plus
    float32 rounding of the origins; the bias is removed exactly along the normal (driver docstring).
    """
    radius = source_shape.params["radius"]
    delta = source_shape.facet_error
    slack = f32_slack(2 * np.sqrt(3) * R)
    return 2 * radius - 2 * delta - slack, 2 * radius + slack


def test_transfer_reads_the_source_sphere_along_the_normal_and_a_self_bake_does_not(target, source):
    # Source of the expected value: a sphere's chord along the inward normal is 2R (elementary
    # geometry; REFERENCES.md "Chord geometry").  Tolerance: normal_chord_band (facet + float32).
    low, high = normal_chord_band(source)
    result = thickbake.bake(target, size=SIZE, cone=0, source=source.mesh)
    values = result.values[result.covered]
    assert result.covered.sum() > 4000
    assert result.info["transfer"]["unprojected_texels"] == 0
    assert values.min() >= low and values.max() <= high, (values.min(), values.max(), low, high)

    # The coarse target baked on its own measures its own facets.  Its chord from p along −n is the
    # exit distance from a convex polyhedron, min over faces f with n_f·d > 0 of (ρ_f − n_f·p)/(n_f·d)
    # (elementary: the polyhedron is the intersection of its faces' half-spaces).  At interior texels
    # the bake's sample is the texel centre, mapped to the surface through the per-face layout.
    own = thickbake.bake(target, size=SIZE, cone=0)
    rows, cols, points, normals = interior_texel_points(icosphere_triangles(), cells=9, size=SIZE)
    expected = polyhedron_exit(icosphere_triangles(), points, -normals)
    measured = own.values[rows, cols]
    # bias correction exact along the normal; the sample may sit 4·bias off an edge (keep_off_edges),
    # which moves the chord by at most that times its slope (< 2 on this convex body): 8·bias + float32
    bias = own.settings.bias
    assert np.abs(measured - expected).max() <= 8 * bias + f32_slack(2 * np.sqrt(3) * R)
    # The shortening the facets cause, stated: 2R − chord averages ~0.078R over interior texels (the
    # target's points lie 0.934R–1R from the centre), far outside the transfer's band of 2δ ≈ 5e-4R.
    shortening = 2 * R - expected
    assert shortening.mean() > 50 * (high - low)
    assert (measured < low).mean() > 0.95


def interior_texel_points(triangles, cells, size, margin=0.02):
    """Texels whose centre lies inside a face's UV triangle (all barycentrics > margin), and the
    surface point and radial-interpolated unit normal there (the layout of per_face_target)."""
    rows, cols = np.mgrid[0:size, 0:size]
    u = (cols.ravel() + 0.5) / size
    v = 1.0 - (rows.ravel() + 0.5) / size          # OBJ convention: v up, row 0 at the top
    cu, cv = np.floor(u * cells).astype(int), np.floor(v * cells).astype(int)
    k = cv * cells + cu
    s = (np.stack([u * cells - cu, v * cells - cv], axis=1) - CORNERS[0]) / (CORNERS[1, 0] - CORNERS[0, 0])
    bary = np.stack([1 - s[:, 0] - s[:, 1], s[:, 0], s[:, 1]], axis=1)
    ok = (k < len(triangles)) & (bary > margin).all(axis=1)
    k, bary = k[ok], bary[ok]
    points = np.einsum("nk,nkj->nj", bary, triangles[k])
    radial = np.einsum("nk,nkj->nj", bary, triangles[k] / np.linalg.norm(triangles[k], axis=2, keepdims=True))
    normals = radial / np.linalg.norm(radial, axis=1, keepdims=True)
    return rows.ravel()[ok], cols.ravel()[ok], points, normals


def polyhedron_exit(triangles, points, directions):
    """Exit distance from a convex polyhedron (its faces' half-spaces) along each direction."""
    n = np.cross(triangles[:, 1] - triangles[:, 0], triangles[:, 2] - triangles[:, 0])
    n /= np.linalg.norm(n, axis=1, keepdims=True)
    rho = np.einsum("fj,fj->f", n, triangles[:, 0])
    along = directions @ n.T
    gap = rho[None, :] - points @ n.T
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(along > 0, gap / along, np.inf)
    return t.min(axis=1)


def test_transfer_cosine_lobe_reads_four_thirds_r(target, source):
    # Source: cosine-weighted hemisphere mean chord of a sphere, 4R/3 (REFERENCES.md, chord geometry).
    # Tolerance per texel: k·σ_pool (σ_pool the RMS of the bake's standard-error map: each texel's σ̂
    # comes from 4 randomised-QMC replicates, only 3 dof, but on the sphere every texel sees the same
    # integrand by symmetry, so the pooled value has thousands of dof; k = 6 ≥ the two-sided normal
    # quantile at 1e-3 / 10⁴ texels, 5.3) + facet + bias: start and exit points lie within δ of the ideal sphere; an exit
    # off by δ lengthens the chord by ≤ δ/cosθ and a start off by δ by ≤ δ/cosθ, whose cosine-lobe
    # mean is ∫δ/x·2x dx = 2δ each, 4δ in all; the bias residual b(1 − cos²θ)/cosθ averages 4b/3.
    result = thickbake.bake(target, size=SIZE, rays=64, source=source.mesh)
    covered = result.covered
    values = result.values[covered].astype(np.float64)
    sigma = result.stderr[covered].astype(np.float64)
    systematic = 4 * source.facet_error + 4 * result.settings.bias / 3 + f32_slack(result.settings.reach)
    assert result.info["miss_fraction"] == 0
    sigma_pool = float(np.sqrt(np.mean(sigma ** 2)))
    assert np.all(np.abs(values - 4 * R / 3) <= 6 * sigma_pool + systematic)
    area = result.area[covered].astype(np.float64)
    mean = (area * values).sum() / area.sum()
    sigma_mean = np.sqrt((area ** 2 * sigma ** 2).sum()) / area.sum()
    assert abs(mean - 4 * R / 3) <= 4 * sigma_mean + systematic


def test_open_target_reads_the_closed_source_with_no_escapes(source):
    # A sphere with its top cap removed (faces whose centroid has z > 0.5R): baked on its own, rays
    # escape through the hole; from the closed source every inward ray hits (the source is closed).
    tri = icosphere_triangles()
    kept = tri[tri.mean(axis=1)[:, 2] <= 0.5 * R]
    assert len(kept) < len(tri)
    open_target = per_face_target(kept, cells=9)
    assert not load_asset(open_target).report.watertight
    low, high = normal_chord_band(source)
    along = thickbake.bake(open_target, size=SIZE, cone=0, source=source.mesh)
    values = along.values[along.covered]
    assert values.min() >= low and values.max() <= high
    assert along.info["transfer"]["unprojected_texels"] == 0
    lobe = thickbake.bake(open_target, size=SIZE, rays=16, source=source.mesh)
    assert lobe.info["escape_fraction"] == 0 and lobe.info["miss_fraction"] == 0
    alone = thickbake.bake(open_target, size=SIZE, rays=16)
    assert alone.info["escape_fraction"] > 0.01       # the test can tell: the target alone leaks


def test_cage_pushed_outwards_gives_the_search_distance_map(target, source):
    # A cage built as p + D·n at every corner sets, at a sample with barycentrics b, the point
    # p + D·Σbᵢnᵢ: the direction is the target's interpolated normal (normalised: the same unit
    # vector up to float64 rounding, ~1e-16) and the distance D·|Σbᵢnᵢ| ≤ D.  The searches differ
    # only in that rounding and in the shorter reach, which matters only for source points between
    # D·|Σbᵢnᵢ| and D from the target (none here: all lie within the facet sag, < 0.07R, of D ≈ 0.17R).
    # float64 rounding of a direction survives its float32 conversion only at a rounding tie, so the
    # maps are expected bit-identical; allowed: one float32 ulp of a chord of 2R per texel.
    asset = load_asset(target)
    distance = SEARCH_DIAGONAL_FRACTION * asset.diagonal
    cage_corners = asset.triangles + distance * asset.triangle_normals
    cage = trimesh.Trimesh(cage_corners.reshape(-1, 3), np.arange(3 * len(cage_corners)).reshape(-1, 3),
                           process=False)
    searched = thickbake.bake(asset, size=SIZE, rays=16, source=source.mesh, search_distance=distance)
    caged = thickbake.bake(asset, size=SIZE, rays=16, source=source.mesh, cage=cage)
    assert caged.info["transfer"]["mode"] == "cage"
    assert np.array_equal(searched.covered, caged.covered)
    assert np.abs(searched.values - caged.values).max() <= np.spacing(np.float32(2 * R))
    assert searched.info["transfer"]["distance"]["max"] < distance * 0.5


def test_cage_finds_a_source_inside_the_target(target):
    # A source of radius 0.9R lies wholly inside the target (whose points are 0.934R–R from the centre,
    # see the first test), so from the target point it is found only beyond it, away from the cage:
    # the cage's search runs from the cage point through the target point and as far again beyond.
    # Expected: 2 · 0.9R along the normal, within the inner sphere's normal_chord_band.
    inner = shapes.sphere(radius=0.9 * R, segments=192)
    asset = load_asset(target)
    distance = SEARCH_DIAGONAL_FRACTION * asset.diagonal   # > the largest gap, 0.1R
    cage_corners = asset.triangles + distance * asset.triangle_normals
    cage = trimesh.Trimesh(cage_corners.reshape(-1, 3), np.arange(3 * len(cage_corners)).reshape(-1, 3),
                           process=False)
    result = thickbake.bake(asset, size=64, cone=0, source=inner.mesh, cage=cage)
    assert result.info["transfer"]["unprojected_texels"] == 0
    low, high = normal_chord_band(inner)
    values = result.values[result.covered]
    assert values.min() >= low and values.max() <= high


def test_cage_must_share_the_targets_topology(target, source):
    fewer = trimesh.Trimesh(target.vertices, target.faces[:-1], process=False)
    with pytest.raises(ThickbakeError, match="triangles"):
        thickbake.bake(target, size=32, cone=0, source=source.mesh, cage=fewer)
    shuffled = target.faces.copy()
    shuffled[[0, 1]] = shuffled[[1, 0]]
    # the same positions with two triangles swapped: a different pairing of corners
    welded = trimesh.Trimesh(target.vertices, shuffled, process=False)
    with pytest.raises(ThickbakeError, match="topology|triangles"):
        thickbake.bake(target, size=32, cone=0, source=source.mesh, cage=welded)


def test_unprojected_share_is_exact_for_a_target_partly_out_of_reach(source):
    # Two copies of the icosphere: one around the source, one 10R away along x, far beyond the search
    # distance (5% of the combined diagonal, ≈ 0.6R).  The far copy's UV cells are the near copy's moved
    # up by exactly half the map (8 of 16 rows; dyadic coordinates, so the rasteriser sees an exact
    # translate): the far copy holds exactly half the layout's texels, and exactly those must be
    # reported unprojected (left to padding), with the near half reading 2R.
    tri = icosphere_triangles()
    near = per_face_target(tri, cells=16)
    far = per_face_target(tri + np.array([10 * R, 0.0, 0.0]), cells=16, first_cell=128, centre=(10 * R, 0, 0))
    both = trimesh.util.concatenate([near, far])
    size = 256
    result = thickbake.bake(both, size=size, cone=0, source=source.mesh)
    info = result.info["transfer"]
    alone = thickbake.bake(both, size=size, cone=0)            # which texels the layout covers
    far_half = alone.covered & (np.arange(size)[:, None] < size // 2)   # v ≥ 0.5 is the top half
    assert far_half.sum() * 2 == alone.covered.sum()
    assert np.array_equal(result.unprojected, far_half)
    assert info["unprojected_texels"] == far_half.sum()
    assert info["unprojected_share"] == 0.5
    assert info["layout_texels"] == alone.covered.sum()
    low, high = normal_chord_band(source)
    values = result.values[result.covered]
    assert values.min() >= low and values.max() <= high
    assert np.array_equal(result.covered, alone.covered & ~far_half)
    assert any("found no point of the source" in w for w in result.info["warnings"])
    mask = result.unprojected_mask()
    assert mask.dtype == np.uint8 and set(np.unique(mask)) == {0, 255}


def test_engines_agree_on_projection(target, source):
    # Two ray backends, one interface: trimesh's intersector gives the same matches as Embree.
    from thickbake.pipeline.trace import TrimeshEngine
    from thickbake.pipeline.transfer import load_source, project

    pytest.importorskip("embreex")
    solid = load_source(source.mesh)
    asset = load_asset(target)
    rng = np.random.default_rng(3)
    face = rng.integers(0, len(asset.triangles), 200)
    bary = rng.dirichlet(np.ones(3), 200)
    points = np.einsum("nk,nkj->nj", bary, asset.triangles[face])
    normals = asset.face_normals[face]
    reach = np.full(200, 0.2)
    from thickbake.pipeline.trace import EmbreeEngine

    a = project(EmbreeEngine(solid.trace_vertices, solid.trace_faces), solid.face_normals, points, normals, reach, reach)
    b = project(TrimeshEngine(solid.trace_vertices, solid.trace_faces), solid.face_normals, points, normals, reach, reach)
    assert np.array_equal(a[2], b[2]) and a[2].all()
    # float32 (Embree) against float64 (trimesh) distances: a few ulps of the coordinates
    assert np.abs(a[1] - b[1]).max() < 1e-5


def test_cage_or_search_distance_without_a_source_is_a_user_error(target):
    with pytest.raises(ThickbakeError, match="source"):
        thickbake.bake(target, size=32, cone=0, search_distance=0.1)
    with pytest.raises(ThickbakeError, match="search distance"):
        thickbake.bake(target, size=32, cone=0, source=target, search_distance=-1.0)


# ---------------------------------------------------------------------------- command line
def run_cli(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "thickbake", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd, timeout=300)


@pytest.fixture(scope="module")
def files(tmp_path_factory, source):
    """An OBJ target half out of the source's reach (as in the exact-share test) and the source, no UVs."""
    folder = tmp_path_factory.mktemp("transfer")
    tri = icosphere_triangles()
    both = trimesh.util.concatenate([
        per_face_target(tri, cells=16),
        per_face_target(tri + np.array([10 * R, 0.0, 0.0]), cells=16, first_cell=128, centre=(10 * R, 0, 0))])
    target_path = folder / "pebble_low.obj"
    target_path.write_text(trimesh.exchange.obj.export_obj(both, include_texture=True, write_texture=False,
                                                           mtl_name=None))
    high = trimesh.Trimesh(shapes.sphere(radius=R, segments=96).mesh.vertices,
                           shapes.sphere(radius=R, segments=96).mesh.faces, process=False)
    source_path = folder / "pebble_high.obj"
    source_path.write_text(trimesh.exchange.obj.export_obj(high, include_texture=False, include_normals=False))
    return target_path, source_path


def test_cli_bake_from_source_writes_map_mask_and_transfer_record(files, tmp_path):
    target_path, source_path = files
    out, mask = tmp_path / "pebble.png", tmp_path / "pebble_missed.png"
    proc = run_cli("bake", target_path, "--from", source_path, "-o", out, "--size", 128, "--cone", 0,
                   "--unprojected-mask", mask)
    assert proc.returncode == 0, proc.stderr
    side = json.loads(out.with_suffix(".json").read_text())
    transfer = side["transfer"]
    assert transfer["sources"][0]["file"] == source_path.name and transfer["sources"][0]["watertight"]
    assert transfer["unprojected_share"] == 0.5 and side["unprojected_mask"] == mask.name
    assert "found no source point" in proc.stdout and "found no point of the source" in proc.stderr
    from thickbake.maps.files import read_image

    missed = read_image(mask)
    assert missed.dtype == np.uint8 and (missed == 255).sum() == transfer["unprojected_texels"]
    # decoded 16-bit codes read 2R on every projected texel (half a code step of quantisation)
    enc = side["encoding"]
    codes = read_image(out).astype(np.float64)
    values = enc["offset"] + enc["scale"] * codes / enc["code_max"]
    projected = (missed == 0) & (codes > 0)
    low, high = normal_chord_band(shapes.sphere(radius=R, segments=96))
    step = enc["scale"] / enc["code_max"] / 2
    assert values[projected].min() >= low - step and values[projected].max() <= high + step


@pytest.mark.parametrize("extra, message", [
    (["--cage-mesh", "cage.obj"], "needs a source solid"),
    (["--search-distance", "0.1", "--unprojected-mask", "m.png"], "need a source solid"),
])
def test_cli_transfer_options_without_source_exit_2_and_write_nothing(files, tmp_path, extra, message):
    target_path, _ = files
    proc = run_cli("bake", target_path, "-o", tmp_path / "x.png", *extra, cwd=tmp_path)
    assert proc.returncode == 2 and message in proc.stderr and "Traceback" not in proc.stderr
    assert list(tmp_path.iterdir()) == []


def test_cli_cage_of_another_topology_exits_2(files, tmp_path):
    target_path, source_path = files
    proc = run_cli("bake", target_path, "--from", source_path, "--cage-mesh", source_path, "-o", tmp_path / "x.png")
    assert proc.returncode == 2 and "cage" in proc.stderr and "Traceback" not in proc.stderr
    assert list(tmp_path.iterdir()) == []


def test_cli_verify_from_source_reports_coverage_distances_and_closedness(files, tmp_path, source):
    target_path, source_path = files
    proc = run_cli("verify", target_path, "--from", source_path, "--size", 64, "--rays", 16, "--json", "-")
    assert proc.returncode == 1, proc.stderr
    report = json.loads(proc.stdout)
    rows = {c["quantity"]: c for c in report["checks"]}
    # exactly half of the layout is out of reach (construction of `files`, see the exact-share test)
    assert rows["projection coverage"]["status"] == "FAIL" and rows["projection coverage"]["measured"] == 0.5
    assert rows["source closed"]["status"] == "PASS" and rows["rays escaping the source"]["measured"] == 0
    spread = rows["projection distance"]["figures"]
    # the near copy's points lie 0.934R–R from the centre (facet sag of the icosphere, computed in
    # test_transfer_reads_the_source_sphere...), so every projection distance is at most 1 − 0.934 R
    assert 0 < spread["p50"] <= spread["p95"] <= spread["max"] <= 0.07 * R

    # a closed target wholly within reach, from a source with its top cap cut off: closedness and
    # escaping rays fail, and the target's texels under the hole find nothing
    near = tmp_path / "near.obj"
    near.write_text(trimesh.exchange.obj.export_obj(per_face_target(icosphere_triangles(), cells=9),
                                                    include_texture=True, write_texture=False, mtl_name=None))
    sphere = source.mesh
    keep = sphere.vertices[sphere.faces].mean(axis=1)[:, 2] < 0.9 * R
    open_source = tmp_path / "open_high.obj"
    open_source.write_text(trimesh.exchange.obj.export_obj(
        trimesh.Trimesh(sphere.vertices, sphere.faces[keep], process=False), include_texture=False,
        include_normals=False))
    proc = run_cli("verify", near, "--from", open_source, "--size", 64, "--rays", 16, "--json", "-")
    assert proc.returncode == 1, proc.stderr
    rows = {c["quantity"]: c for c in json.loads(proc.stdout)["checks"]}
    assert rows["projection coverage"]["status"] == "FAIL" and 0.5 < rows["projection coverage"]["measured"] < 1
    assert rows["source closed"]["status"] == "FAIL" and rows["rays escaping the source"]["status"] == "FAIL"
    proc = run_cli("verify", near, "--from", files[1], "--size", 64, "--rays", 16, "--json", "-")
    assert proc.returncode == 0 and json.loads(proc.stdout)["verdict"] == "fit for a transfer bake"


# ---------------------------------------------------------------------------- batch
BATCH_RULES = """\
[defaults]
size = 64
cone = 0

[[rule]]
match = "**/*_low.obj"
source = "{base}_high.obj"
"""


def test_batch_measures_low_assets_in_their_high_siblings(files, tmp_path):
    from thickbake.batch.schedule import run_batch
    from thickbake.maps.files import read_image

    _, source_path = files
    src = tmp_path / "assets"
    (src / "people").mkdir(parents=True)
    target = per_face_target(icosphere_triangles(), cells=9)
    (src / "people/bust_low.obj").write_text(trimesh.exchange.obj.export_obj(
        target, include_texture=True, write_texture=False, mtl_name=None))
    (src / "people/bust_high.obj").write_bytes(source_path.read_bytes())
    (src / "thickbake.toml").write_text(BATCH_RULES)
    out = tmp_path / "maps"
    outcome = run_batch(src, out, jobs=1)
    assert outcome.exit_code == 0
    # the high mesh is an input of bust_low, not an asset: it gets no map of its own
    assert sorted(j.asset.rel for j in outcome.plan.jobs) == ["people/bust_low.obj"]
    assert not (out / "people/bust_high.thickness.png").exists()
    side = json.loads((out / "people/bust_low.thickness.json").read_text())
    assert side["transfer"]["sources"][0]["file"] == "bust_high.obj"
    assert side["transfer"]["unprojected_texels"] == 0
    # decoded codes read 2R (normal_chord_band of the 96-segment source, plus half a code step)
    enc = side["encoding"]
    codes = read_image(out / "people/bust_low.thickness.png").astype(np.float64)
    solid = codes > 0
    values = enc["offset"] + enc["scale"] * codes[solid] / enc["code_max"]
    low, high = normal_chord_band(shapes.sphere(radius=R, segments=96))
    step = enc["scale"] / enc["code_max"] / 2
    assert values.min() >= low - step and values.max() <= high + step
    # up to date until the source changes
    again = run_batch(src, out, jobs=1)
    assert [j.status for j in again.plan.jobs] == ["skipped"]
    with open(src / "people/bust_high.obj", "a") as handle:
        handle.write("# touched\n")
    third = run_batch(src, out, jobs=1)
    assert [j.status for j in third.plan.jobs] == ["baked"]


@pytest.mark.parametrize("table, message", [
    ('source = "{name}_high.obj"', "placeholders"),
    ('source = "C:/high.obj"', "relative"),
    ('search_distance = -1', "positive"),
    ('search_distance = 0.1', "without a source"),
    ('source = "{base}_high.obj"\ncage = "{base}_cage.obj"\nsearch_distance = 0.1', "both cage"),
])
def test_batch_rules_refuse_bad_transfer_keys(tmp_path, table, message):
    from thickbake.batch.plan import plan_batch

    src = tmp_path / "assets"
    src.mkdir()
    target = per_face_target(icosphere_triangles(), cells=9)
    (src / "a_low.obj").write_text(trimesh.exchange.obj.export_obj(target, include_texture=True,
                                                                   write_texture=False, mtl_name=None))
    (src / "thickbake.toml").write_text(f'[[rule]]\nmatch = "*"\n{table}\n')
    with pytest.raises(ThickbakeError, match=message):
        plan_batch(src, tmp_path / "out")


def test_every_material_map_of_the_target_measures_in_the_source(source):
    # Two materials (two scene geometries: the icosphere's faces above and below z = 0, each face in its
    # own UV cell) make two maps; each is measured in the source and reads 2R (normal_chord_band).
    tri = icosphere_triangles()
    upper = tri.mean(axis=1)[:, 2] > 0
    scene = trimesh.Scene()
    for name, keep in (("cap", upper), ("bowl", ~upper)):
        part = per_face_target(tri, cells=9).submesh([np.flatnonzero(keep)], append=True)
        part.visual.material = trimesh.visual.material.SimpleMaterial(name=name)
        scene.add_geometry(part, geom_name=name)
    maps = thickbake.bake_maps(scene, size=SIZE, cone=0, source=source.mesh)
    assert len(maps) == 2
    low, high = normal_chord_band(source)
    for result in maps:
        assert result.info["transfer"]["unprojected_texels"] == 0
        values = result.values[result.covered]
        assert result.covered.sum() > 1000 and values.min() >= low and values.max() <= high
