"""Unit checks of the array kernels: rasteriser, padding, encoding, settings, ray engines."""

import math

import numpy as np
import pytest

from thickbake.maps import encode

from thickbake.maps import padding

from thickbake.pipeline import texels
from thickbake.errors import ThickbakeError
from thickbake.settings import BakeSettings, RunOptions, default_pad, parse_size, settings_from_mapping


def _rasterise_all(tri_uv, width, height, supersample=1):
    tri_px = texels.uv_to_pixels(np.asarray(tri_uv, float), width, height)
    idx = np.arange(len(tri_px))
    jac = np.ones(len(tri_px))
    samples, overlapped = texels.rasterise_tile(tri_px, idx, jac, 0, 0, max(width, height), width, height, supersample)
    return samples, overlapped


QUAD = [[[0.25, 0.25], [0.75, 0.25], [0.75, 0.75]], [[0.25, 0.25], [0.75, 0.75], [0.25, 0.75]]]


def test_quad_on_texel_grid_claims_each_texel_once():
    # a 0.5 x 0.5 UV square on a 64² map covers exactly 32 x 32 texels; the shared diagonal passes
    # through texel centres, and the top-left rule gives each of them to one triangle only
    samples, overlapped = _rasterise_all(QUAD, 64, 64)
    assert overlapped == 0
    assert len(samples) == 32 * 32
    assert len(np.unique(samples.texel)) == 32 * 32
    rows, cols = samples.texel // 64, samples.texel % 64
    assert rows.min() == 16 and rows.max() == 47 and cols.min() == 16 and cols.max() == 47
    assert np.allclose(samples.area, 1.0)  # jacobian 1, K = 1
    assert (samples.bary >= -1e-12).all() and np.allclose(samples.bary.sum(axis=1), 1)


def test_row_zero_is_v_one():
    # OBJ/glTF convention: UV (0, 0) is the bottom-left of the image, row 0 is v = 1
    tri = [[[0.0, 0.9], [0.1, 0.9], [0.0, 1.0]]]
    samples, _ = _rasterise_all(tri, 10, 10)
    assert set((samples.texel // 10).tolist()) == {0}


def test_stacked_islands_are_overlap():
    samples, overlapped = _rasterise_all(QUAD + QUAD, 64, 64)
    assert overlapped == 32 * 32
    _, counts = np.unique(samples.texel, return_counts=True)
    assert (counts == 2).all()


def test_mirrored_island_rasterises():
    mirrored = [[[b, a] for a, b in t] for t in QUAD]  # swap u and v: reverses orientation
    samples, overlapped = _rasterise_all(mirrored, 64, 64)
    assert len(samples) == 32 * 32 and overlapped == 0


def test_partial_texels_get_clamped_samples():
    # a triangle off the texel grid: every texel its area touches gets exactly one sample, and
    # the clamped samples lie in the triangle
    tri = [[[0.113, 0.207], [0.871, 0.333], [0.402, 0.917]]]
    w = h = 40
    samples, _ = _rasterise_all(tri, w, h)
    assert len(np.unique(samples.texel)) == len(samples)
    # reference: texels whose square overlaps the triangle, by dense point sampling of the triangle
    px = texels.uv_to_pixels(np.asarray(tri, float), w, h)[0]
    r = np.random.default_rng(0).random((400000, 2))
    r = np.where(r.sum(1, keepdims=True) > 1, 1 - r, r)
    pts = px[0] + r[:, :1] * (px[1] - px[0]) + r[:, 1:] * (px[2] - px[0])
    touched = np.unique(np.floor(pts[:, 1]).astype(int) * w + np.floor(pts[:, 0]).astype(int))
    assert set(touched.tolist()) <= set(samples.texel.tolist())
    assert (samples.bary >= 0).all()
    border = samples.area == 0
    assert border.any() and (~border).any()


def test_supersample_sub_positions_and_area():
    samples, _ = _rasterise_all(QUAD, 16, 16, supersample=3)
    assert len(samples) == 8 * 8 * 9
    assert np.allclose(samples.area, 1 / 9)
    assert set(samples.sub.tolist()) == set(range(9))


def test_morton_order_is_z_order():
    w = 4
    texel = np.arange(16)
    order = texels.morton_order(texel, w)
    # Z order over a 4x4 grid: (r,c) = (0,0),(0,1),(1,0),(1,1),(0,2),...
    assert texel[order][:8].tolist() == [0, 1, 4, 5, 2, 3, 6, 7]


def test_padding_keeps_covered_and_fills_band():
    values = np.zeros((20, 20), np.float32)
    covered = np.zeros((20, 20), bool)
    covered[8:12, 8:12] = True
    values[8:12, 8:12] = np.arange(16, dtype=np.float32).reshape(4, 4) + 1
    out, filled = padding.pad_map(values, covered, 3)
    assert np.array_equal(out[covered], values[covered])
    ring = filled & ~covered
    # every empty texel within 3 texel-centre distances got filled, and nothing beyond
    from scipy import ndimage
    dist = ndimage.distance_transform_edt(~covered)
    assert np.array_equal(ring, (~covered) & (dist <= 3))
    assert (out[ring] > 0).all() and (out[~filled] == 0).all()
    full, filled_all = padding.pad_map(values, covered, "fill")
    assert filled_all.all() and (full > 0).all() and np.array_equal(full[covered], values[covered])
    # a padded texel holds its nearest covered neighbour's value
    assert out[7, 8] == values[8, 8] and out[12, 11] == values[11, 11]


@pytest.mark.parametrize("bits", [8, 16])
def test_encode_round_trip_within_half_a_code(bits):
    reach = 2.7
    thickness = np.linspace(0, reach, 1001).reshape(7, 143)
    for invert in (False, True):
        stored = encode.normalise(thickness, "thickness", reach, invert)
        codes = encode.quantise(stored, bits)
        offset, scale = encode.decode_coefficients("thickness", reach, invert)
        back = encode.decode(codes, offset, scale, bits)
        step = encode.quantisation_step("thickness", reach, bits)
        assert step == pytest.approx(reach / ((1 << bits) - 1))
        assert np.abs(back - thickness).max() <= 0.5 * step * (1 + 1e-9)
    assert encode.quantise(np.array([1.0]), 16)[0] == 65535


def test_settings_validation_messages():
    with pytest.raises(ThickbakeError, match="rays"):
        BakeSettings(rays=0)
    with pytest.raises(ThickbakeError, match="lobe"):
        BakeSettings(lobe="gauss")
    with pytest.raises(ThickbakeError, match="unknown setting 'rayz'"):
        BakeSettings.from_mapping({"rayz": 4})
    with pytest.raises(ThickbakeError, match="GiB"):
        BakeSettings(size=32768)
    assert parse_size("2048x1024") == (2048, 1024)
    with pytest.raises(ThickbakeError):
        parse_size("0")
    assert default_pad(1024, 1024) == 4 and default_pad(64, 64) == 2
    s = BakeSettings().resolve(2.0)
    assert s.reach == 2.0 and s.bias == pytest.approx(2e-4) and s.pad == 4
    assert BakeSettings(measure="occlusion").resolve(2.0).reach == 0.5
    assert BakeSettings(seed=1).content_hash() != BakeSettings(seed=2).content_hash()


def test_run_options_are_split_from_map_content():
    content, run = settings_from_mapping({"size": 512, "threads": 2, "chunk_rays": 4096, "order": "rows"})
    assert content == BakeSettings(size=512) and run == RunOptions(threads=2, chunk_rays=4096, order="rows")
    with pytest.raises(ThickbakeError, match="threads"):
        RunOptions(threads=0)
    with pytest.raises(ThickbakeError, match="unknown setting 'threads'"):
        BakeSettings.from_mapping({"threads": 2})
    with pytest.raises(ThickbakeError, match="GiB"):  # the memory cap weighs both together
        settings_from_mapping({"chunk_rays": 1 << 28})
    # batch runs decide "up to date" by this hash, so its values must not move when fields are regrouped:
    # the pins are the hashes thickbake computed while run options were still fields it dropped
    assert BakeSettings().content_hash() == "92ee6943c1c394dd4337e016dad873cd0d899a77a69b1748149e61ab7ffa65b7"
    assert (BakeSettings(size=(512, 256), measure="occlusion", seed=3).content_hash()
            == "c6fdf1105ae847dbe5d2612e0d697b13fdfca8ca07c4ac1f2889000d5b4fbb5b")


def test_engines_agree():
    # the two ray backends answer the same rays alike (two backends behind one interface must agree);
    # where embreex has no wheel (e.g. ARM) there is only the fallback and nothing to compare
    pytest.importorskip("embreex")
    import trimesh

    from thickbake.pipeline.trace import EmbreeEngine, TrimeshEngine

    mesh = trimesh.creation.icosphere(subdivisions=3, radius=1.0)
    rng = np.random.default_rng(4)
    origins = (rng.uniform(-0.5, 0.5, size=(500, 3))).astype(np.float32)  # inside the unit sphere
    dirs = rng.normal(size=(500, 3))
    dirs = (dirs / np.linalg.norm(dirs, axis=1, keepdims=True)).astype(np.float32)
    origins[:20] = [5, 0, 0]  # some rays start outside and point away: misses
    dirs[:20] = [1, 0, 0]
    a_dist, a_hit, a_face = EmbreeEngine(mesh.vertices, mesh.faces).first_hit_faces(origins, dirs, 10.0)
    b_dist, b_hit, b_face = TrimeshEngine(mesh.vertices, mesh.faces).first_hit_faces(origins, dirs, 10.0)
    assert np.array_equal(a_hit, b_hit) and not a_hit[:20].any() and a_hit[20:].all()
    # float32 embree vs float64 trimesh: agree to float32 rounding of unit-scale coordinates
    assert np.abs(a_dist - b_dist).max() < 1e-5
    assert (a_face[a_hit] == b_face[b_hit]).mean() > 0.99


def test_keep_off_edges_moves_only_edge_samples():
    tri = np.array([[[0.0, 0, 0], [1.0, 0, 0], [0.0, 1.0, 0]]])
    bary = np.array([[0.5, 0.5, 0.0], [0.2, 0.3, 0.5], [1.0, 0.0, 0.0]])
    out = texels.keep_off_edges(tri, np.zeros(3, np.int64), bary, 0.01)
    heights = np.array([1 / np.sqrt(2), 1.0, 1.0])  # distance from each corner to its opposite edge
    assert (out * heights >= 0.01 - 1e-12).all()
    assert np.array_equal(out[1], bary[1])                  # already far from every edge
    assert np.allclose(out.sum(axis=1), 1)
    tiny = texels.keep_off_edges(tri * 1e-4, np.zeros(1, np.int64), bary[:1], 0.01)
    assert np.allclose(tiny, 1 / 3)                          # too small a triangle: its centroid



def test_islands_without_overlap_report_none():
    # the sphere's UV layout has no overlapping islands (tests/test_shapes.py checks that), and its
    # 45° diagonals pass through texel centres at 256²: the top-left rule must give each centre to
    # exactly one triangle, which needs exactly opposite edge functions on shared edges
    from thickbake.checks import shapes
    from thickbake.pipeline.load import load_asset

    asset = load_asset(shapes.sphere().mesh)
    for size in (192, 256):
        px = texels.uv_to_pixels(asset.triangle_uv, size, size)
        idx = np.arange(len(px))
        samples, overlapped = texels.rasterise_tile(px, idx, np.ones(len(px)), 0, 0, size, size, size, 1)
        assert overlapped == 0, size
        assert len(np.unique(samples.texel)) == len(samples)
