"""``thickbake compare``: two maps decoded through their sidecars and compared in measure units."""

import json

import numpy as np
import pytest
from PIL import Image

import thickbake
from thickbake.checks import shapes
from thickbake.cli.main import main
from thickbake.checks.compare import COLOUR_A_ABOVE, COLOUR_A_BELOW, LEGEND_HEIGHT, LEGEND_MIN_WIDTH, compare_maps, load_map
from thickbake.maps.files import atomic_write_bytes, image_bytes, json_bytes

SIZE = 64


@pytest.fixture(scope="module")
def sphere_bake():
    return thickbake.bake(shapes.sphere(segments=24).mesh, size=SIZE, rays=16)


@pytest.fixture
def maps(sphere_bake, tmp_path):
    """The same bake written as a 16-bit PNG, an 8-bit PNG and a float TIFF."""
    r16 = sphere_bake
    r16.write(tmp_path / "a16.png")
    thickbake.BakeResult(**{**r16.__dict__, "settings": r16.settings.replace(bits=8)}).write(tmp_path / "a8.png")
    r16.write(tmp_path / "float.tif")
    return tmp_path


def run_cli(capsys, *args):
    code = main(["compare", *map(str, args)])
    out = capsys.readouterr()
    return code, out.out, out.err


def run_json(capsys, *args):
    """``thickbake compare ARGS --json -`` through the real entry point: (exit code, figures as JSON)."""
    code, out, err = run_cli(capsys, *args, "--json", "-")
    return code, json.loads(out)


def test_figures_of_a_known_difference(tmp_path, capsys):
    # A planted difference with figures worked out by hand: 1200 texels non-empty in either map, 400 of
    # them +0.03 (A > B), 200 −0.25 (A < B), the rest equal.  RMSE = √((400·0.03² + 200·0.25²)/1200),
    # PSNR = 20·log10(peak / RMSE) with peak the larger full scale (reach 2 for these thickness maps).
    a = np.zeros((40, 50))
    a[5:35, 5:45] = 0.5
    b = a.copy()
    b[5:15, 5:45] -= 0.03
    b[25:30, 5:45] += 0.25
    _write_float(tmp_path / "a.tif", a, reach=2.0)
    _write_float(tmp_path / "b.tif", b, reach=1.0)
    rmse = np.sqrt((400 * 0.03 ** 2 + 200 * 0.25 ** 2) / 1200)
    c = compare_maps(load_map(tmp_path / "a.tif"), load_map(tmp_path / "b.tif"), tolerance=0.1)
    assert c.count == 1200 and c.peak == 2.0                  # thickness: full scale = reach, the larger one
    assert c.rmse == pytest.approx(rmse, rel=1e-6)          # float32 storage of 0.5 ± 0.03 / 0.25
    assert c.max_abs == pytest.approx(0.25, rel=1e-6)
    assert c.psnr == pytest.approx(20 * np.log10(2.0 / rmse), rel=1e-6)
    assert (c.beyond, c.a_above, c.a_below) == (200, 0, 200)
    assert c.share_beyond == pytest.approx(200 / 1200)
    # the command line reports the same figures as JSON on stdout, and fails beyond --max-share
    code, doc = run_json(capsys, tmp_path / "a.tif", tmp_path / "b.tif", "--tolerance", "0.1")
    assert code == 1 and doc["passed"] is False
    assert doc["rmse"] == pytest.approx(c.rmse) and doc["texels_compared"] == 1200 and doc["beyond"] == 200
    code, doc = run_json(capsys, tmp_path / "a.tif", tmp_path / "b.tif", "--tolerance", "0.1", "--max-share", "0.2")
    assert code == 0 and doc["passed"] is True and doc["max_share"] == 0.2
    # equal maps: no difference, PSNR infinite (null in JSON), and the command passes
    code, doc = run_json(capsys, tmp_path / "a.tif", tmp_path / "a.tif")
    assert code == 0 and doc["rmse"] == 0 and doc["max_abs"] == 0 and doc["psnr_db"] is None


def test_8_bit_against_16_bit_within_half_steps(maps, capsys, sphere_bake):
    # both encodings round the same value to nearest: |A − B| ≤ ½·reach/255 + ½·reach/65535
    reach = sphere_bake.settings.reach
    bound = 0.5 * reach / 255 + 0.5 * reach / 65535
    c = compare_maps(load_map(maps / "a8.png"), load_map(maps / "a16.png"))
    assert 0 < c.max_abs <= bound * (1 + 1e-12)
    assert c.tolerance == pytest.approx(reach / 255)  # default: one 8-bit step of the coarser map
    code, doc = run_json(capsys, maps / "a8.png", maps / "a16.png")
    assert code == 0 and doc["tolerance"] == pytest.approx(reach / 255) and doc["beyond"] == 0


def test_png_against_float_tiff(maps, sphere_bake):
    # the TIFF holds the float32 measure; the 16-bit PNG is within half a code step of it, plus float32
    # rounding of the stored value (2^-24 relative of the reach)
    reach = sphere_bake.settings.reach
    c = compare_maps(load_map(maps / "a16.png"), load_map(maps / "float.tif"))
    assert c.max_abs <= 0.5 * reach / 65535 + 2.0**-24 * reach


def test_different_reach_compares_in_scene_units(sphere_bake, tmp_path):
    # reach 3 and 6 both exceed every chord of the unit sphere (2R = 2), so the maps hold the same
    # thickness; decoded through each sidecar they agree within half a 16-bit step of each reach
    # (the float32 bakes themselves are identical: the reach only clips)
    mesh = shapes.sphere(segments=24).mesh
    thickbake.bake(mesh, size=SIZE, rays=16, reach=3.0).write(tmp_path / "r3.png")
    thickbake.bake(mesh, size=SIZE, rays=16, reach=6.0).write(tmp_path / "r6.png")
    c = compare_maps(load_map(tmp_path / "r3.png"), load_map(tmp_path / "r6.png"))
    assert c.max_abs <= 0.5 * 3.0 / 65535 + 0.5 * 6.0 / 65535 + 1e-7
    assert c.peak == 6.0  # PSNR peak: the larger full-scale range


def test_inverted_map_decodes_to_the_same_thickness(sphere_bake, maps, tmp_path):
    inverted = thickbake.BakeResult(**{**sphere_bake.__dict__, "settings": sphere_bake.settings.replace(invert=True)})
    inverted.write(tmp_path / "inv.png")
    c = compare_maps(load_map(tmp_path / "inv.png"), load_map(maps / "a16.png"))
    assert c.max_abs <= sphere_bake.settings.reach / 65535 * (1 + 1e-9)  # ½ step each way


def _write_float(path, values, measure="thickness", reach=1.0):
    atomic_write_bytes(path, image_bytes(values.astype(np.float32), ".tif"))
    side = {"measure": measure, "reach": reach, "coverage": 0.5,
            "encoding": {"format": "TIFF", "code_max": None, "offset": 0.0, "scale": 1.0}}
    atomic_write_bytes(path.with_suffix(".json"), json_bytes(side))


def test_difference_image_colours_and_share(tmp_path, capsys):
    a = np.zeros((40, 50))
    a[5:35, 5:45] = 0.5
    b = a.copy()
    b[5:15, 5:45] += 0.1   # A < B: blue
    b[25:35, 5:45] -= 0.2  # A > B: red
    _write_float(tmp_path / "a.tif", a)
    _write_float(tmp_path / "b.tif", b)
    diff = tmp_path / "diff.png"
    code, doc = run_json(capsys, tmp_path / "a.tif", tmp_path / "b.tif", "-o", diff, "--tolerance", "0.05")
    assert code == 1 and doc["passed"] is False
    assert doc["share_beyond"] == pytest.approx(20 * 40 / (30 * 40))
    assert (doc["a_above"], doc["a_below"]) == (10 * 40, 10 * 40)
    image = np.asarray(Image.open(diff))
    assert image.shape == (40 + LEGEND_HEIGHT, max(50, LEGEND_MIN_WIDTH), 3)
    # saturation at max(|A − B|, tolerance) = 0.2: the red band is full red, the blue band half way
    assert tuple(image[30, 20]) == tuple(COLOUR_A_ABOVE.astype(np.uint8))
    blue = image[10, 20].astype(float)
    assert blue == pytest.approx((255 + COLOUR_A_BELOW) / 2, abs=1)
    assert tuple(image[20, 20]) == (255, 255, 255)
    # the legend strip holds both end colours and light label text
    strip = image[40:]
    assert (np.abs(strip.astype(int) - COLOUR_A_BELOW.astype(int)).sum(axis=2) < 10).any()
    assert (np.abs(strip.astype(int) - COLOUR_A_ABOVE.astype(int)).sum(axis=2) < 10).any()
    # allowing the share passes
    code, _, _ = run_cli(capsys, tmp_path / "a.tif", tmp_path / "b.tif", "--tolerance", "0.05", "--max-share", "0.7")
    assert code == 0


def test_size_mismatch_is_a_user_error(sphere_bake, maps, tmp_path, capsys):
    thickbake.bake(shapes.sphere(segments=24).mesh, size=32, rays=4).write(tmp_path / "small.png")
    diff = tmp_path / "diff.png"
    code, out, err = run_cli(capsys, maps / "a16.png", tmp_path / "small.png", "-o", diff)
    assert code == 2 and "differ in size" in err and "64x64" in err and "32x32" in err
    assert len(err.strip().splitlines()) == 1 and not diff.exists()


def test_other_user_errors(maps, tmp_path, capsys):
    _write_float(tmp_path / "occ.tif", np.zeros((SIZE, SIZE)), measure="occlusion")
    code, _, err = run_cli(capsys, maps / "a16.png", tmp_path / "occ.tif")
    assert code == 2 and "different measures" in err
    (tmp_path / "lonely.png").write_bytes((maps / "a16.png").read_bytes())
    code, _, err = run_cli(capsys, tmp_path / "lonely.png", maps / "a16.png")
    assert code == 2 and "no sidecar" in err
    code, _, err = run_cli(capsys, maps / "a16.png", maps / "a16.png", "-o", tmp_path / "diff.jpg")
    assert code == 2 and "must be a PNG" in err
    # a sidecar that does not match its image
    side = json.loads((maps / "a8.json").read_text())
    (tmp_path / "wrong.png").write_bytes((maps / "a16.png").read_bytes())
    (tmp_path / "wrong.json").write_text(json.dumps(side))
    code, _, err = run_cli(capsys, tmp_path / "wrong.png", maps / "a16.png")
    assert code == 2 and "do not belong together" in err and len(err.strip().splitlines()) == 1
    # the same without the map checksum (a sidecar of an older version): the code range catches it
    side.pop("map_sha256")
    (tmp_path / "wrong.json").write_text(json.dumps(side))
    code, _, err = run_cli(capsys, tmp_path / "wrong.png", maps / "a16.png")
    assert code == 2 and "codes go to 255" in err
    assert not list(tmp_path.glob(".*.tmp"))
