"""Delivery formats: linear PNG tags, EXR, channel packing, measured media, reach shares and fits, and the
same switches in batch rules.  Each check names the source of its expected value."""

import json
import math
import subprocess
import sys

import numpy as np
import pytest
from PIL import Image

import browser_support as bs
import gltf_assets as ga
from thickbake.checks import shapes
from thickbake.maps.png import chunks, decode_png, encode_png
from thickbake.media import MEDIA, gltf_attenuation, parse_scene_unit

SIZE = 32


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "thickbake", *map(str, args)], capture_output=True, text=True,
                          cwd=cwd, timeout=300)


@pytest.fixture(scope="module")
def ball_obj(tmp_path_factory):
    """A sphere of radius 1 as OBJ (no unit in the file)."""
    folder = tmp_path_factory.mktemp("ball")
    paths = shapes.write_shape_set(folder, [shapes.sphere(radius=1.0)])
    return next(p for p in paths if p.suffix == ".obj")


# ---------------------------------------------------------------------------- measured media
# sigma_tr = sqrt(3 sigma_a (sigma_a + sigma_s')) per channel, worked out by hand from the table of
# Jensen, Marschner, Levoy & Hanrahan, SIGGRAPH 2001 (as listed in REFERENCES.md), 5 significant digits.
HAND_SIGMA_TR = {
    "apple": (0.14366, 0.15625, 0.52745),
    "chicken1": (0.086168, 0.25748, 0.57),
    "chicken2": (0.10598, 0.29872, 0.55857),
    "cream": (0.066544, 0.21441, 0.39349),
    "ketchup": (0.21001, 1.7397, 2.5373),
    "marble": (0.11752, 0.17966, 0.25308),
    "potato": (0.070095, 0.13836, 0.49112),
    "skimmilk": (0.054276, 0.095754, 0.28556),
    "skin1": (0.27224, 0.73178, 1.4648),
    "skin2": (0.20741, 0.59042, 0.91746),
    "spectralon": (0.0, 0.0, 0.0),
    "wholemilk": (0.091753, 0.15208, 0.39866),
}


def test_every_preset_sigma_tr_matches_the_hand_computation():
    assert set(MEDIA) == set(HAND_SIGMA_TR)
    for name, expected in HAND_SIGMA_TR.items():
        # 5 significant digits: relative rounding at most 5e-5 (1e-5 absolute below 0.1)
        np.testing.assert_allclose(MEDIA[name].sigma_tr, expected, rtol=6e-5, atol=1e-9, err_msg=name)


def test_scene_units_and_attenuation_consistency():
    assert parse_scene_unit("1cm") == 10.0 and parse_scene_unit("25.4mm") == 25.4
    assert parse_scene_unit("1 m") == 1000.0 and parse_scene_unit("2in") == 50.8
    # KHR_materials_volume: T(x) = c^(x/d) must equal exp(-sigma_tr * mm_per_unit * x) for any x
    for medium in MEDIA.values():
        color, distance = gltf_attenuation(medium.sigma_tr, 10.0)
        for x in (0.01, 0.5, 3.0):
            expected = np.exp(-medium.sigma_tr * 10.0 * x)
            got = np.asarray(color) ** (x / distance) if distance else np.ones(3)
            np.testing.assert_allclose(got, expected, rtol=1e-12, err_msg=medium.name)


def test_medium_bake_writes_rgb_transmittance(ball_obj, tmp_path):
    out = tmp_path / "ball.skin.png"
    proc = run("bake", ball_obj, "-o", out, "--size", SIZE, "--cone", 0, "--medium", "Skin1", "--scene-unit", "1cm")
    assert proc.returncode == 0, proc.stderr
    side = json.loads(out.with_suffix(".json").read_text())
    assert side["medium"]["medium"] == "Skin1" and side["medium"]["mm_per_unit"] == 10.0
    assert side["color_space"] == "linear"
    rgb = decode_png(out.read_bytes())
    assert rgb.shape == (SIZE, SIZE, 3) and rgb.dtype == np.uint16
    # along -N the chord of a sphere is 2R (closed form); T = exp(-sigma_tr * 10 mm * 2) per channel.
    # Tolerance: the chord of the faceted sphere is within 2 facet errors of 2R, dT/dd = sigma*T.
    sigma = np.asarray(side["medium"]["sigma_tr_per_mm"]) * 10.0
    expected = np.exp(-sigma * 2.0)
    covered = rgb[..., 0] < 65535
    got = rgb[covered] / 65535.0
    tol = sigma * expected * 2 * shapes.sphere(radius=1.0).facet_error + 1 / 65535
    assert np.all(np.abs(got - expected) <= tol)


def test_medium_without_unit_on_obj_is_refused(ball_obj, tmp_path):
    proc = run("bake", ball_obj, "-o", tmp_path / "m.png", "--size", 16, "--medium", "marble")
    assert proc.returncode == 2 and "--scene-unit" in proc.stderr
    assert not (tmp_path / "m.png").exists()


def test_medium_list_names_the_source():
    proc = run("bake", "--medium", "list")
    assert proc.returncode == 0 and "SIGGRAPH 2001" in proc.stdout and "Marble" in proc.stdout


# ---------------------------------------------------------------------------- linear tags
def test_integer_maps_are_tagged_linear(ball_obj, tmp_path):
    out = tmp_path / "ball.png"
    assert run("bake", ball_obj, "-o", out, "--size", SIZE, "--rays", 4, "--bits", 8).returncode == 0
    data = out.read_bytes()
    kinds = [k for k, _ in chunks(data)]
    # PNG specification: gAMA and cICP must come before IDAT; gamma 1.0 is stored as 100000
    assert kinds.index(b"gAMA") < kinds.index(b"IDAT") and kinds.index(b"cICP") < kinds.index(b"IDAT")
    assert b"sRGB" not in kinds and b"iCCP" not in kinds
    assert dict(chunks(data))[b"cICP"] == bytes([1, 8, 0, 1])  # H.273: BT.709 primaries, linear transfer
    with Image.open(out) as image:  # Pillow (a general-purpose reader) checks the CRCs and reports the gamma
        image.load()
        assert image.info["gamma"] == 1.0
    assert json.loads(out.with_suffix(".json").read_text())["color_space"] == "linear"


# ---------------------------------------------------------------------------- EXR
@pytest.mark.parametrize("sample_type, rtol", [("float", 0.0), ("half", 2.0 ** -11)])
def test_exr_holds_the_measure_and_its_decode(ball_obj, tmp_path, sample_type, rtol):
    import OpenEXR  # the Academy Software Foundation's reference binding reads the file back

    tif = tmp_path / "ball.tif"
    exr = tmp_path / "ball_exr.exr"
    assert run("bake", ball_obj, "-o", tif, "--size", SIZE, "--rays", 8).returncode == 0
    proc = run("bake", ball_obj, "-o", exr, "--size", SIZE, "--rays", 8, "--exr-type", sample_type)
    assert proc.returncode == 0, proc.stderr
    with OpenEXR.File(str(exr)) as handle:
        header = dict(handle.header())
        pixels = handle.channels()["Y"].pixels
        assert pixels.dtype == (np.float16 if sample_type == "half" else np.float32)
        samples = np.asarray(pixels, np.float64)
    with Image.open(tif) as image:
        reference = np.asarray(image, np.float64)
    # same seed, same map: float is exact, half rounds to 11 significant bits (IEEE 754 binary16)
    np.testing.assert_allclose(samples, reference, rtol=rtol, atol=0)
    assert header["thickbake_measure"] == "thickness" and "value" in header["thickbake_formula"]
    assert json.loads(header["thickbake_decode"])["measure"] == "thickness"


# ---------------------------------------------------------------------------- channel packing
def test_packing_into_an_existing_16_bit_image_keeps_other_channels(ball_obj, tmp_path):
    rng = np.random.default_rng(7)
    target = tmp_path / "masks.png"
    original = rng.integers(0, 65536, size=(SIZE, SIZE, 4), dtype=np.uint16)
    target.write_bytes(encode_png(original, linear=False))
    ref = tmp_path / "ref.png"
    proc = run("bake", ball_obj, "-o", ref, "--size", SIZE, "--rays", 8, "--pack-into", target, "--channel", "g")
    assert proc.returncode == 0, proc.stderr
    packed = decode_png(target.read_bytes())
    assert packed.dtype == np.uint16 and packed.shape == original.shape
    for c in (0, 2, 3):
        assert np.array_equal(packed[..., c], original[..., c])
    with Image.open(ref) as image:
        assert np.array_equal(packed[..., 1], np.asarray(image))
    side = json.loads(target.with_suffix(".json").read_text())
    assert side["channels"]["g"]["measure"] == "thickness" and side["color_space"] == "linear"
    assert json.loads(ref.with_suffix(".json").read_text())["packed_into"]["channels"] == {"g": "thickness"}


def test_several_measures_into_one_new_8_bit_image(ball_obj, tmp_path):
    target = tmp_path / "new.png"
    proc = run("bake", ball_obj, "--size", SIZE, "--rays", 8, "--bits", 8, "--pack-into", target,
               "--channel", "r=thickness", "--channel", "b=occlusion")
    assert proc.returncode == 0, proc.stderr
    packed = decode_png(target.read_bytes())
    assert packed.dtype == np.uint8 and packed.shape == (SIZE, SIZE, 4)
    for channel, measure in ((0, "thickness"), (2, "occlusion")):
        single = tmp_path / f"{measure}.png"
        assert run("bake", ball_obj, "-o", single, "--size", SIZE, "--rays", 8, "--bits", 8,
                   "--measure", measure).returncode == 0
        with Image.open(single) as image:
            assert np.array_equal(packed[..., channel], np.asarray(image))
    assert (packed[..., 1] == 0).all() and (packed[..., 3] == 255).all()
    side = json.loads(target.with_suffix(".json").read_text())
    assert {c: e["measure"] for c, e in side["channels"].items()} == {"r": "thickness", "b": "occlusion"}


# ---------------------------------------------------------------------------- reach
def test_reach_share_and_fit(ball_obj, tmp_path):
    share = tmp_path / "share.png"
    assert run("bake", ball_obj, "-o", share, "--size", SIZE, "--rays", 8, "--reach", "30%").returncode == 0
    side = json.loads(share.with_suffix(".json").read_text())
    diagonal = 2 * math.sqrt(3)  # bounding box of the unit sphere: a cube of side 2
    assert abs(side["reach"] - 0.3 * diagonal) <= 1e-9 * diagonal
    fit = tmp_path / "fit.png"
    assert run("bake", ball_obj, "-o", fit, "--size", SIZE, "--rays", 8, "--reach", "fit").returncode == 0
    side = json.loads(fit.with_suffix(".json").read_text())
    record = side["reach_fit"]
    assert record["percentile"] == 99.5 and side["reach"] == record["reach"] <= record["traced_reach"]
    with Image.open(fit) as image:
        codes = np.asarray(image)
    covered = codes > 0
    # the top code is used: the share of texels at it is the clipped share plus those at the percentile
    assert (codes[covered] == 65535).mean() >= record["texels_clipped"]
    assert codes.max() == 65535


# ---------------------------------------------------------------------------- batch
def test_batch_delivers_gltf_copies_packs_and_shares_a_reach(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    doc, blob = ga.rich_asset(shapes.sphere(radius=1.0).mesh, scale=0.01)
    ga.write_glb(src / "figure.glb", doc, blob)
    doc2, blob2 = ga.rich_asset(shapes.sphere(radius=1.0).mesh, scale=0.02)
    ga.write_glb(src / "bigger.glb", doc2, blob2)
    for path in shapes.write_shape_set(src, [shapes.box()]):
        if path.suffix != ".obj":
            path.unlink()
    (src / "thickbake.toml").write_text(
        "[defaults]\nsize = 32\nrays = 8\ncone = 0\n\n"
        '[[rule]]\nmatch = "*.glb"\nwrite_gltf = true\ngltf_transmission = 1.0\nshared_reach = "props"\n\n'
        '[[rule]]\nmatch = "*.obj"\nformat = "exr"\npack = { r = "thickness", b = "occlusion" }\n')
    out = tmp_path / "out"
    proc = run("batch", src, "-o", out)
    assert proc.returncode == 0, proc.stderr
    copies = [out / "figure.volume.glb", out / "bigger.volume.glb"]
    for report in bs.validate_gltf(copies):  # Khronos glTF Validator: zero errors
        assert report["numErrors"] == 0, report["messages"]
    sides = [json.loads((out / f"{n}.thickness.json").read_text()) for n in ("figure", "bigger")]
    assert sides[0]["reach"] == sides[1]["reach"] == sides[0]["shared_reach"]["reach"]
    assert sorted(sides[0]["shared_reach"]["members"]) == ["bigger.glb", "figure.glb"]
    # one shared world reach; the local factor is the reach over each asset's node scale
    for path, scale in zip(copies, (0.01, 0.02)):
        gdoc, _ = ga.glb_parts(path.read_bytes())
        factor = gdoc["materials"][0]["extensions"]["KHR_materials_volume"]["thicknessFactor"]
        assert abs(factor * scale - sides[0]["reach"]) <= 1e-12 * sides[0]["reach"]
    obj_stem = next(p.stem for p in src.glob("*.obj"))
    packed = decode_png((out / f"{obj_stem}.packed.png").read_bytes())
    assert packed.shape == (32, 32, 4)
    assert (out / f"{obj_stem}.thickness.exr").is_file()
    # a second run finds everything up to date; a changed member rebakes its whole group only
    again = run("batch", src, "-o", out, "--dry-run")
    assert again.returncode == 0, again.stderr
    assets = [line for line in again.stdout.splitlines() if " -> " in line]
    assert len(assets) == 3 and all(": skip" in line for line in assets), again.stdout
    ga.write_glb(src / "bigger.glb", *ga.rich_asset(shapes.sphere(radius=1.0).mesh, scale=0.03))
    third = run("batch", src, "-o", out, "--dry-run")
    lines = third.stdout.splitlines()
    assert any(line.startswith("figure.glb") and ": bake" in line for line in lines), third.stdout
    assert any(line.startswith(f"{obj_stem}.obj") and ": skip" in line for line in lines), third.stdout


def test_batch_write_gltf_on_an_obj_fails_that_asset(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    for path in shapes.write_shape_set(src, [shapes.box()]):
        if path.suffix != ".obj":
            path.unlink()
    (src / "thickbake.toml").write_text("[defaults]\nsize = 16\nrays = 4\nwrite_gltf = true\n")
    proc = run("batch", src, "-o", tmp_path / "out")
    assert proc.returncode == 1
    (row,) = json.loads((tmp_path / "out" / "report.json").read_text())["assets"]
    assert row["status"] == "failed" and "write_gltf applies to glTF sources" in row["error"]
