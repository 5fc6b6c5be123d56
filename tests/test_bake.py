"""End-to-end bakes of analytic shapes, checked against closed forms named beside each check.

Tolerance recipe (stated once, used throughout):

* Monte-Carlo: a texel's mean of n rays has standard error σ/√n, σ² the per-ray variance from the
  closed-form moments.  Over m texels we allow z·σ/√n with z = Φ⁻¹(1 − 10⁻³/(2m)) (Bonferroni: the
  chance that any texel of independent rays exceeds it is below 10⁻³).  Sobol directions with a
  per-sample rotation are more accurate than independent rays, so this bound is conservative.
* Facet: texel points lie on flat facets up to ``shape.facet_error`` (δ) inside the ideal surface, and
  the exit point too, so a chord can be short by up to 2δ.
* Quantisation: a 16-bit code holds reach/65535 per step; rounding costs at most half a step.
* float32: positions and distances are traced in float32 (relative rounding 6e-8); 1e-5 scene units
  covers a few roundings on these unit-sized shapes.
* Bias: origins start ``bias`` inside along −N and the bake adds bias·cosθ to each hit distance.  Along
  the normal (cone 0) that is exact, so cone-0 checks carry no bias term.  Off the normal a residual
  remains; on a sphere it is known exactly (ray–sphere intersection from the offset origin), so the
  hemisphere checks put it into the expected value (``offset_chord``, integrated with scipy's quad)
  instead of the tolerance.
"""

import json
import math

import numpy as np
import pytest
from scipy import integrate
from scipy.stats import norm

import thickbake
from thickbake.checks import shapes
from thickbake.maps.encode import decode
from thickbake.maps.files import read_image


def z_bonferroni(m: int, alpha: float = 1e-3) -> float:
    return float(norm.isf(alpha / (2 * max(m, 1))))


@pytest.fixture(scope="module")
def sphere():
    return shapes.sphere(radius=1.0)


def offset_chord(cos_theta, radius: float, bias: float):
    """What the bake reports for one ray inside a perfect sphere: the hit distance from the origin
    ``bias`` inside along −N, plus the correction bias·cosθ.

    Elementary ray–sphere intersection: from the point (R − b)·N, a ray at angle θ from −N leaves the
    sphere after t = (R − b)cosθ + √((R − b)²cos²θ + 2Rb − b²).  For b = 0 this is the chord 2R cosθ.
    """
    c = np.asarray(cos_theta, np.float64)
    inner = radius - bias
    return inner * c + np.sqrt(inner * inner * c * c + 2 * radius * bias - bias * bias) + bias * c


def lobe_mean(g, lobe: str) -> float:
    """E[g(cosθ)] over the hemisphere by scipy.integrate.quad in μ = cosθ (dΩ = dμ dφ): the cosine
    lobe has density 2μ on [0, 1], the uniform lobe density 1 (independent numerical integration)."""
    weight = (lambda mu: 2 * mu) if lobe == "cosine" else (lambda mu: 1.0)
    return integrate.quad(lambda mu: float(g(mu)) * weight(mu), 0, 1, epsabs=1e-13, epsrel=1e-12)[0]


def decoded_png(path):
    side = json.loads(path.with_suffix(".json").read_text())
    enc = side["encoding"]
    bits = 16 if enc["code_max"] == 65535 else 8
    return decode(read_image(path), enc["offset"], enc["scale"], bits), side


def test_sphere_along_normal_is_diameter(sphere, tmp_path):
    # sphere chord along the inward normal = 2R (elementary geometry: the normal through a sphere point passes through its centre)
    result = thickbake.bake(sphere.mesh, size=128, cone=0)
    out = tmp_path / "s.png"
    result.write(out)
    values, side = decoded_png(out)
    covered = result.covered
    tol = 2 * sphere.facet_error + 0.5 * side["reach"] / 65535 + 1e-5
    assert np.abs(values[covered] - 2.0).max() <= tol
    assert side["rays_per_sample"] == 1 and side["miss_fraction"] == 0


@pytest.mark.parametrize("lobe", ["cosine", "uniform"])
def test_sphere_hemisphere_means(sphere, lobe):
    # chord ℓ = 2R cosθ: cosine lobe E[ℓ] = 4R/3, E[ℓ²] = 2R²; uniform lobe E[ℓ] = R, E[ℓ²] = 4R²/3.
    # The expected value integrates what the bake measures from its offset origin (offset_chord) with
    # quad; it differs from 4R/3 or R by about the bias.
    rays = 64
    result = thickbake.bake(sphere.mesh, size=96, rays=rays, lobe=lobe)
    bias = result.settings.bias
    expected = lobe_mean(lambda mu: offset_chord(mu, 1.0, bias), lobe)
    assert expected == pytest.approx(4 / 3 if lobe == "cosine" else 1.0, abs=0.05)
    sigma = math.sqrt(lobe_mean(lambda mu: offset_chord(mu, 1.0, bias) ** 2, lobe) - expected ** 2)
    values = result.values[result.covered]
    tol = z_bonferroni(values.size) * sigma / math.sqrt(rays) + 2 * sphere.facet_error
    assert np.abs(values - expected).max() <= tol
    # the average over texels has a far smaller error; independent rays would give σ/√(n·m)
    assert abs(values.mean() - expected) <= 4 * sigma / math.sqrt(rays * values.size) + 2 * sphere.facet_error


def test_bias_correction_is_exact_along_the_normal():
    # box a×b×c along the normal: the chord is the box's extent across the face (planar faces, no facet
    # error).  Origins start ``bias`` inside; adding bias·cosθ (cosθ = 1 here) must give the extent
    # back exactly, up to float32 rounding (1e-5 on this unit-sized box).  A bias of 1% of the longest
    # side makes a missing or wrong correction 1000× larger than that rounding.
    box = shapes.box()
    extents = sorted(box.params[k] for k in ("size_x", "size_y", "size_z"))
    bias = 0.01
    result = thickbake.bake(box.mesh, size=64, cone=0, bias=bias)
    values = result.values[result.covered].astype(np.float64)
    nearest = np.array(extents)[np.argmin(np.abs(values[:, None] - np.array(extents)[None, :]), axis=1)]
    assert np.abs(values - nearest).max() <= 1e-5
    assert set(np.unique(nearest)) == set(extents)     # every pair of faces is in the map
    assert result.info["origins_closer"] == 0           # the full bias was used everywhere


def test_bias_correction_on_the_hemisphere():
    # sphere R = 1, cosine lobe, bias b = 0.05 R.  The bake's expected mean is the lobe integral of
    # offset_chord (ray–sphere intersection from the offset origin, plus the bake's b·cosθ), by quad:
    # 4R/3 + 4b/3 to first order.  Without the correction it would be lower by b·E[cosθ] = 2b/3 = 0.033.
    # Tolerance: 4σ/√(n·m) for the mean of m texels of n rays (independent-sampling bound; Sobol does
    # better), plus 3δ: the start point lies up to δ inside the ideal sphere (moves the mean by at most
    # (2/3)δ to first order) and the exit point up to δ (δ/cosθ along the ray, 2δ over the cosine lobe).
    sphere = shapes.sphere(radius=1.0)
    bias, rays = 0.05, 64
    result = thickbake.bake(sphere.mesh, size=96, rays=rays, bias=bias)
    values = result.values[result.covered].astype(np.float64)
    expected = lobe_mean(lambda mu: offset_chord(mu, 1.0, bias), "cosine")
    sigma = math.sqrt(lobe_mean(lambda mu: offset_chord(mu, 1.0, bias) ** 2, "cosine") - expected ** 2)
    tol = 4 * sigma / math.sqrt(rays * values.size) + 3 * sphere.facet_error
    assert tol < bias / 3                                # the check can tell a missing correction
    assert abs(values.mean() - expected) <= tol
    assert result.info["origins_closer"] == 0


def test_standard_error_map_is_calibrated():
    # With independent random directions a texel's error (mean − expected) divided by its reported
    # standard error is a Student-like statistic: the share of texels within ±1.96 standard errors is
    # what the same statistic gives on simulated rays.  The reported standard error starts from the spread
    # of R = 4 replicate means (rays j ≡ r mod 4; randomised-QMC replicates, Owen 1997) and is moderated
    # with the texel's aligned 4×4 block (Smyth 2004, §4); on the sphere every texel has the same
    # variance, so the prior degrees of freedom come out unbounded or, by chance (the estimated excess
    # spread is positive for about half of all draws), at least the 3·15 = 45 dof a block can lend, and
    # either way σ̃² is the mean over the block's covered texels of their replicate variances.  The simulation forms the same statistic on the bake's
    # own covered mask: per texel the sample standard deviation of its 4 replicate means over √4, squared,
    # averaged over its block.  The reference share is simulated here with numpy from the exact per-ray
    # law on the sphere (cosine lobe: cosθ = √u, value offset_chord), not with the package.  Texels are
    # independent (each has its own random stream), so the bake's share has binomial spread √(p(1−p)/m)
    # (REFERENCES.md, "Error bars"); the facet error (≤ 2δ per texel, see
    # test_bias_correction_on_the_hemisphere) moves each texel's statistic by at most 2δ/se, bracketed by
    # shifting the simulated statistic by that much either way.  Allowance: 4 binomial standard deviations
    # of the bake's share plus 4 of the simulation's.  A standard-error map off by 2× either way moves the
    # share to about 0.67 or 0.9995.
    sphere = shapes.sphere(radius=1.0)
    rays = 64
    result = thickbake.bake(sphere.mesh, size=96, rays=rays, sequence="random")
    assert result.info["stderr_dof"]["prior"] is None or result.info["stderr_dof"]["prior"] >= 45
    bias = result.settings.bias
    covered = result.covered
    values = result.values[covered].astype(np.float64)
    stderr = result.stderr[covered].astype(np.float64)
    expected = lobe_mean(lambda mu: offset_chord(mu, 1.0, bias), "cosine")
    share = float(np.mean(np.abs(values - expected) <= 1.96 * stderr))

    n = int(covered.sum())
    repeats = max(1, 100_000 // n)
    sims = repeats * n
    rng = np.random.default_rng(11)
    blocks = covered.reshape(24, 4, 24, 4)
    in_block = blocks.sum(axis=(1, 3))
    sim_err, sim_se = [], []
    for _ in range(repeats):
        draws = offset_chord(np.sqrt(rng.random((n, rays))), 1.0, bias)
        sim_err.append(draws.mean(axis=1) - expected)
        replicate_means = draws.reshape(n, rays // 4, 4).mean(axis=1)
        own = np.zeros(covered.shape)
        own[covered] = replicate_means.var(axis=1, ddof=1) / 4
        pooled = own.reshape(24, 4, 24, 4).sum(axis=(1, 3)) / np.maximum(in_block, 1)
        sim_se.append(np.sqrt(np.kron(pooled, np.ones((4, 4)))[covered]))
    sim_err, sim_se = np.concatenate(sim_err), np.concatenate(sim_se)
    shift = 2 * sphere.facet_error
    p_low = float(np.mean(np.abs(sim_err) + shift <= 1.96 * sim_se))
    p_high = float(np.mean(np.abs(sim_err) - shift <= 1.96 * sim_se))
    p = 0.5 * (p_low + p_high)
    allowance = 4 * math.sqrt(p * (1 - p) / values.size) + 4 * math.sqrt(p * (1 - p) / sims)
    assert p_low - allowance <= share <= p_high + allowance, (share, p_low, p_high, allowance)


def test_torus_along_normal():
    # torus: the normal lies in the meridian plane through the tube centre, chord = 2r everywhere
    torus = shapes.torus(major_radius=1.0, minor_radius=0.3)
    result = thickbake.bake(torus.mesh, size=128, cone=0)
    tol = 2 * torus.facet_error + 1e-5
    assert np.abs(result.values[result.covered] - 0.6).max() <= tol


def test_hollow_shell_along_normal_both_surfaces():
    # hollow sphere r_out/r_in: along the normal the chord is r_out − r_in from either surface
    shell = shapes.hollow_shell(outer_radius=1.0, inner_radius=0.8)
    result = thickbake.bake(shell.mesh, size=128, cone=0)
    tol = 2 * shell.facet_error + 1e-5
    values = result.values[result.covered]
    assert np.abs(values - 0.2).max() <= tol
    # both surfaces are present in the map (the inner one is about 64% of the outer's area)
    assert result.info["mesh"]["watertight"]


@pytest.mark.parametrize("name", ["box", "sphere", "l_block", "capped_cylinder"])
def test_cauchy_mean_chord(name):
    # Cauchy's mean chord theorem: area-weighted mean of the cosine-hemisphere mean chord = 4V/S
    # (A. Cauchy 1832; L. A. Santaló 1976); for the non-convex L block each chord segment counts
    # (Mazzolo, Roesslinger & Gille, J. Math. Phys. 44:6195, 2003 — from memory).  V and S are the
    # traced polyhedron's, so the facet error cancels; the 1% budget covers the midpoint-rule
    # quadrature of the texel grid and the Monte-Carlo error of the mean.
    shape = {"box": shapes.box, "sphere": shapes.sphere, "l_block": shapes.l_block,
             "capped_cylinder": shapes.capped_cylinder}[name]()
    result = thickbake.bake(shape.mesh, size=256, rays=32)
    weight = result.area[result.covered].astype(np.float64)
    measured = float((weight * result.values[result.covered]).sum() / weight.sum())
    assert measured == pytest.approx(shape.cauchy_mean_chord, rel=0.01)
    # the texel quadrature covers the surface: its area sums to the mesh's area within 1%
    assert weight.sum() == pytest.approx(shape.area_mesh, rel=0.01)


def test_cauchy_fails_under_uniform_lobe():
    # the theorem needs cosine weighting: under the uniform lobe a unit cube's surface-averaged mean
    # chord is 0.59776 (OEIS A348682; R. Coleman, J. Appl. Prob. 6:430, 1969), not 2/3
    cube = shapes.box(size=(1.0, 1.0, 1.0))
    result = thickbake.bake(cube.mesh, size=192, rays=64, lobe="uniform")
    weight = result.area[result.covered].astype(np.float64)
    measured = float((weight * result.values[result.covered]).sum() / weight.sum())
    assert measured == pytest.approx(0.5977557435927337, rel=0.01)
    assert abs(measured - 2 / 3) > 0.05


def test_sphere_transmittance(sphere):
    # Beer–Lambert: T = exp(−d/L) with L the glTF attenuationDistance (KHR_materials_volume); over the
    # cosine lobe inside a sphere T̄ = 2[1 − (1 + τ)e^(−τ)]/τ², τ = 2R/L (REFERENCES.md).  The expected
    # value integrates exp(−offset_chord/L) with quad (the closed form at bias 0); its second moment
    # gives the per-ray σ.
    length, rays = 0.5, 64
    result = thickbake.bake(sphere.mesh, size=96, rays=rays, measure="transmittance", attenuation_distance=length)
    bias = result.settings.bias
    expected = lobe_mean(lambda mu: np.exp(-offset_chord(mu, 1.0, bias) / length), "cosine")
    tau = 2.0 / length
    assert expected == pytest.approx(2 * (1 - (1 + tau) * math.exp(-tau)) / tau ** 2, rel=0.01)
    sigma = math.sqrt(lobe_mean(lambda mu: np.exp(-2 * offset_chord(mu, 1.0, bias) / length), "cosine")
                      - expected ** 2)
    values = result.values[result.covered]
    # facet: a chord short by 2δ raises T by at most 2δ/L (|dT/dd| ≤ 1/L)
    tol = z_bonferroni(values.size) * sigma / math.sqrt(rays) + 2 * sphere.facet_error / length
    assert np.abs(values - expected).max() <= tol
    assert result.info["units"] == "unitless"


def test_occlusion_default_reach_is_quarter_diagonal(sphere):
    # a sphere R = 1: diagonal 2√3, reach = √3/2 ≈ 0.866 < 2R, so hits within reach are the
    # directions with 2R cosθ ≤ reach: P = P(cos²θ ≤ (reach/2R)²) = (reach/2R)² under the cosine lobe
    result = thickbake.bake(sphere.mesh, size=64, rays=64, measure="occlusion")
    reach = result.settings.reach
    # the sphere mesh's bounding box is within the facet error of the ideal one's
    assert reach == pytest.approx(0.25 * math.sqrt(3) * 2, abs=sphere.facet_error)
    expected = (reach / 2) ** 2
    values = result.values[result.covered]
    sigma = math.sqrt(expected * (1 - expected))
    # facet: chords short by up to 2δ + bias move P = (r/2R)² by at most (r/2R²)·(2δ + bias)
    facet = reach / 2 * (2 * sphere.facet_error + result.settings.bias)
    assert abs(values.mean() - expected) < 4 * sigma / math.sqrt(64 * values.size) + facet


def test_png_round_trip_and_padding(sphere, tmp_path):
    result = thickbake.bake(sphere.mesh, size=128, rays=16, pad=3)
    out = tmp_path / "m.png"
    result.write(out)
    values, side = decoded_png(out)
    step = side["reach"] / 65535
    covered = result.covered
    # 16-bit round trip: within half a code value, i.e. within one code value
    assert np.abs(values[covered] - result.values[covered]).max() <= 0.5 * step * (1 + 1e-6)
    # padding filled the 3-texel band and nothing else
    from scipy import ndimage
    dist = ndimage.distance_transform_edt(~covered)
    band = (~covered) & (dist <= 3)
    codes = read_image(out)
    assert (codes[band] > 0).all()
    assert (codes[(~covered) & (dist > 3)] == 0).all()
    assert side["stats"]["min"] <= side["stats"]["mean"] <= side["stats"]["max"]
    for key in ("measure", "reach", "inverted", "size", "rays", "coverage", "stats", "miss_fraction",
                "rays_traced", "seconds", "input", "settings", "thickbake_version", "stderr_p95"):
        assert key in side


def test_invert_and_8_bit(sphere, tmp_path):
    result = thickbake.bake(sphere.mesh, size=64, cone=0, invert=True, bits=8)
    out = tmp_path / "inv.png"
    result.write(out)
    values, side = decoded_png(out)
    assert read_image(out).dtype == np.uint8 and side["inverted"]
    assert np.abs(values[result.covered] - 2.0).max() <= 0.5 * side["reach"] / 255 + 2 * sphere.facet_error + 1e-5


def test_float_tiff_holds_raw_measure(sphere, tmp_path):
    result = thickbake.bake(sphere.mesh, size=64, cone=0)
    out = tmp_path / "raw.tif"
    result.write(out, error_out=tmp_path / "err.tif")
    image = read_image(out)
    assert image.dtype == np.float32
    assert np.array_equal(image[result.covered], result.values[result.covered])
    assert (tmp_path / "err.tif").exists()


def test_same_seed_bit_identical_independent_of_threads_and_chunks(sphere, tmp_path):
    a = thickbake.bake(sphere.mesh, size=96, rays=32, seed=7, threads=1)
    b = thickbake.bake(sphere.mesh, size=96, rays=32, seed=7, threads=2, chunk_rays=1 << 12, order="rows")
    c = thickbake.bake(sphere.mesh, size=96, rays=32, seed=8)
    a.write(tmp_path / "a.png")
    b.write(tmp_path / "b.png")
    assert (tmp_path / "a.png").read_bytes() == (tmp_path / "b.png").read_bytes()
    assert np.array_equal(a.values, b.values)
    assert not np.array_equal(a.values, c.values)


def test_obj_and_glb_give_the_same_image(tmp_path):
    # glTF puts UV (0,0) top-left and trimesh flips V on load; OBJ is v-up: both must bake alike
    box = shapes.box()
    paths = shapes.write_shape_set(tmp_path, [box])
    obj = next(p for p in paths if p.suffix == ".obj")
    glb = next(p for p in paths if p.suffix == ".glb")
    a = thickbake.bake(str(obj), size=64, rays=16)
    b = thickbake.bake(str(glb), size=64, rays=16)
    assert np.array_equal(a.covered, b.covered)
    assert np.abs(a.values - b.values).max() < 1e-5  # float32 positions vs float64 text
    ply = tmp_path / "box.ply"  # PLY carries UVs as per-vertex s, t
    box.mesh.export(ply)
    c = thickbake.bake(str(ply), size=64, rays=16)
    assert np.array_equal(a.covered, c.covered) and np.abs(a.values - c.values).max() < 1e-5
    # and the layout is not symmetric under a V flip, so the check has teeth
    assert not np.array_equal(a.covered, a.covered[::-1])


def test_supersampling_covers_same_texels(sphere):
    a = thickbake.bake(sphere.mesh, size=64, cone=0)
    b = thickbake.bake(sphere.mesh, size=64, cone=0, supersample=2)
    assert np.array_equal(a.covered, b.covered)
    assert b.info["surface_samples"] > 3 * a.info["surface_samples"]
    assert np.abs(b.values[b.covered] - 2).max() < 2 * sphere.facet_error + 1e-5


def test_stacked_uv_islands_reported_as_overlap():
    import trimesh

    box = shapes.box(size=(1.0, 1.0, 1.0))
    mesh = box.mesh.copy()
    uv = mesh.visual.uv.copy()
    # stack the six square face islands onto one square, as a game asset reusing texture space would
    island = shapes.uv_islands(mesh)
    vertex_island = np.zeros(len(uv), np.int64)
    vertex_island[mesh.faces.ravel()] = np.repeat(island, 3)
    for k in range(island.max() + 1):  # six islands, not a per-texel loop
        sel = vertex_island == k
        lo, hi = uv[sel].min(axis=0), uv[sel].max(axis=0)
        uv[sel] = 0.2 + 0.6 * (uv[sel] - lo) / (hi - lo)
    mesh.visual = trimesh.visual.TextureVisuals(uv=uv)
    result = thickbake.bake(mesh, size=64, cone=0)
    # border texels get one clamped sample, not a claim per island, so they are not counted
    assert result.info["overlap"] > 0.85
    # every texel averages six faces whose chord along the normal is 1 (unit cube extent)
    assert np.abs(result.values[result.covered] - 1.0).max() < 1e-5  # planar faces, along the normal: float32 only


def test_inside_out_mesh_is_fixed_and_reported(sphere):
    import trimesh

    m = sphere.mesh
    flipped = trimesh.Trimesh(m.vertices, m.faces[:, ::-1], vertex_normals=-m.vertex_normals,
                              visual=trimesh.visual.TextureVisuals(uv=m.visual.uv), process=False)
    result = thickbake.bake(flipped, size=64, cone=0)
    assert result.info["mesh"]["orientation_flipped"]
    assert any("inside-out" in w for w in result.info["mesh"]["warnings"])
    assert np.abs(result.values[result.covered] - 2.0).max() < 2 * sphere.facet_error + 1e-5


def test_scene_node_transforms_apply(tmp_path):
    # a glTF node scale of 2 doubles every chord; a mirroring node keeps the solid outward-facing
    import trimesh

    sphere = shapes.sphere(radius=1.0)
    for matrix in (np.diag([2.0, 2.0, 2.0, 1.0]), np.diag([-2.0, 2.0, 2.0, 1.0])):
        scene = trimesh.Scene()
        scene.add_geometry(sphere.mesh, transform=matrix)
        path = tmp_path / "scaled.glb"
        scene.export(path)
        result = thickbake.bake(str(path), size=64, cone=0)
        assert not result.info["mesh"]["orientation_flipped"]
        # scaled by 2, the facet error doubles: chords short by up to 2·(2δ)
        assert np.abs(result.values[result.covered] - 4.0).max() < 4 * sphere.facet_error + 1e-5


def test_open_mesh_misses_count_as_reach(sphere):
    import trimesh

    m = sphere.mesh
    keep = m.triangles_center[:, 2] < 0.8  # cut a cap off: rays through the hole escape
    opened = trimesh.Trimesh(m.vertices, m.faces[keep], vertex_normals=m.vertex_normals,
                             visual=trimesh.visual.TextureVisuals(uv=m.visual.uv), process=False)
    result = thickbake.bake(opened, size=64, rays=16)
    assert not result.info["mesh"]["watertight"]
    assert result.info["miss_fraction"] > 0
    # escaping rays count as the full reach (here 3.35 > any chord of the sphere, 2R = 2), so texels
    # that see the hole average well above the closed sphere's 4R/3
    assert result.info["stats"]["max"] > 1.6


def test_bundled_candle_glb():
    # the bundled sample is a closed glTF whose UV seams and hard edges split vertices: merged by
    # position it is watertight, no inward ray may escape (origins at sharp rim edges stay inside),
    # and Cauchy's theorem (4V/S, A. Cauchy 1832; Santaló 1976) holds for the whole asset within 1%
    from pathlib import Path

    path = Path(__file__).resolve().parent.parent / "samples" / "candle.glb"
    result = thickbake.bake(str(path), size=256, rays=32)
    mesh = result.info["mesh"]
    assert mesh["watertight"] and mesh["vertices_merged"] < mesh["vertices_in_file"]
    assert result.info["miss_fraction"] == 0
    weight = result.area[result.covered].astype(np.float64)
    measured = float((weight * result.values[result.covered]).sum() / weight.sum())
    assert measured == pytest.approx(4 * mesh["volume"] / mesh["area"], rel=0.01)
