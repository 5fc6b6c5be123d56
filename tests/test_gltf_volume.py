"""glTF write-back (KHR_materials_volume) checked against the outside world.

Sources of the expected values, beside each check:
* Khronos glTF Validator (npm ``gltf-validator``): every written file has zero errors.
* three.js ``GLTFLoader`` in headless Chromium (npm ``three``): what a real engine makes of the file
  — ``MeshPhysicalMaterial.thickness`` = thicknessFactor, ``thicknessMap`` on the baked UV set with
  the map in its G channel, the attenuation colour and distance — with no console errors.
* KHR_materials_volume: thickness = G / code_max × thicknessFactor, in the mesh's own units.
* Closed forms: a sphere of radius R has chord 2R along the inward normal; a box's chord along a
  face normal is its extent across that face (REFERENCES.md, chord geometry).
"""

import json
import subprocess
import sys

import numpy as np
import pytest

import browser_support as bs
import gltf_assets as ga
from thickbake.checks import shapes
from thickbake.maps.png import decode_png
from thickbake.media import get_medium

R = 1.0
SCALE = 0.01
BOX = (1.0, 2.0, 3.0)
SIZE = 64


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "thickbake", *map(str, args)], capture_output=True, text=True,
                          cwd=cwd, timeout=300)


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    """Bake the test assets through the command line; every written glTF copy, by label."""
    src = tmp_path_factory.mktemp("src")
    out = tmp_path_factory.mktemp("out")
    sphere = shapes.sphere(radius=R)
    doc, blob = ga.rich_asset(sphere.mesh, scale=SCALE)
    ga.write_glb(src / "figure.glb", doc, blob)
    (src / "text").mkdir()
    ga.write_gltf(src / "text" / "figure.gltf", doc, blob)
    # a box under a rotated, uniformly scaled parent: a map that varies over the UV layout
    box_doc, box_blob = ga.rich_asset(shapes.box(BOX).mesh, scale=0.5, rotation=(0.0, 0.38268343, 0.0, 0.92387953))
    ga.write_glb(src / "box.glb", box_doc, box_blob)
    common = ["--size", SIZE, "--cone", 0, "--pad", 2]
    jobs = {
        "figure": ["bake", src / "figure.glb", "-o", out / "figure.png", *common, "--reach", "fit",
                   "--write-gltf", out / "figure.volume.glb", "--gltf-transmission", 1],
        "marble": ["bake", src / "figure.glb", "-o", out / "figure.marble.png", *common, "--medium", "marble",
                   "--write-gltf", out / "figure.marble.glb"],
        "text": ["bake", src / "text" / "figure.gltf", "-o", out / "text.png", *common,
                 "--write-gltf", out / "elsewhere" / "figure.volume.gltf"],
        "box": ["bake", src / "box.glb", "-o", out / "box.png", *common, "--bits", "8",
                "--write-gltf", out / "box.volume.glb", "--gltf-transmission", 0.5],
    }
    files = {}
    for label, args in jobs.items():
        proc = run(*args)
        assert proc.returncode == 0, proc.stderr
        files[label] = args[args.index("--write-gltf") + 1]
    return {"src": src, "out": out, "files": files, "sphere": sphere, "input_doc": doc, "input_bin": blob,
            "box_doc": box_doc}


def _embedded_png(doc: dict, bin_chunk: bytes, material: int) -> np.ndarray:
    tex = doc["materials"][material]["extensions"]["KHR_materials_volume"]["thicknessTexture"]["index"]
    image = doc["images"][doc["textures"][tex]["source"]]
    view = doc["bufferViews"][image["bufferView"]]
    return decode_png(bin_chunk[view.get("byteOffset", 0):view.get("byteOffset", 0) + view["byteLength"]])


def test_every_written_gltf_passes_the_khronos_validator(written):
    # source: Khronos glTF Validator, zero errors on each written file
    reports = bs.validate_gltf(list(written["files"].values()))
    for report in reports:
        errors = [m for m in report["messages"] if m["severity"] == 0]
        assert report["numErrors"] == 0, (report["file"], errors)
        assert "KHR_materials_volume" in report["extensionsUsed"]


def test_glb_keeps_everything_else(written):
    data = written["files"]["figure"].read_bytes()
    doc, bin_chunk = ga.glb_parts(data)
    before = written["input_doc"]
    # the BIN chunk grows only at its end; the bytes of the input stay where they were
    assert bin_chunk[:len(written["input_bin"])] == written["input_bin"]
    for key in ("asset", "extras", "scene", "scenes", "nodes", "meshes", "accessors", "animations"):
        assert doc[key] == before[key], key
    assert doc["bufferViews"][:len(before["bufferViews"])] == before["bufferViews"]
    assert doc["materials"][1] == before["materials"][1]  # the stone, not on a UV'd primitive, is untouched
    wax = dict(doc["materials"][0])
    ext = wax.pop("extensions")
    assert wax == before["materials"][0]
    assert set(ext) == {"KHR_materials_volume", "KHR_materials_transmission"}
    assert ext["KHR_materials_transmission"] == {"transmissionFactor": 1.0}
    assert ext["KHR_materials_volume"]["thicknessTexture"]["texCoord"] == 0
    assert doc["extensionsUsed"] == ["KHR_materials_emissive_strength", "KHR_materials_volume",
                                     "KHR_materials_transmission"]
    view = doc["bufferViews"][doc["images"][0]["bufferView"]]
    assert view["byteOffset"] % 4 == 0 and doc["buffers"][0]["byteLength"] >= view["byteOffset"] + view["byteLength"]
    # the embedded image carries no colour-space chunk (glTF 2.0 §3.8.4: the role decides; see maps/png.py)
    png = bin_chunk[view["byteOffset"]:view["byteOffset"] + view["byteLength"]]
    assert b"gAMA" not in png[:64] and b"cICP" not in png[:64]


def test_sphere_under_scaled_node_decodes_to_local_2R(written):
    # KHR_materials_volume: G / code_max × thicknessFactor is the thickness in the mesh's own units;
    # the node scales by 0.01, so the sphere of radius R (mesh units) must read 2R, not 0.02R.
    # Tolerance: the chord along the normal of the faceted sphere differs from 2R by at most twice the
    # facet error (entry and exit), plus half a code step of rounding; "fit" clips the top 0.5% of the
    # texels to the 99.5th percentile, which lies inside the same band.
    doc, bin_chunk = ga.glb_parts(written["files"]["figure"].read_bytes())
    codes = _embedded_png(doc, bin_chunk, 0)
    factor = doc["materials"][0]["extensions"]["KHR_materials_volume"]["thicknessFactor"]
    top = np.iinfo(codes.dtype).max
    covered = codes > 0
    assert covered.mean() > 0.3
    local = codes[covered] / top * factor
    tol = 2 * written["sphere"].facet_error + 0.5 * factor / top
    assert np.abs(local - 2 * R).max() <= tol, (local.min(), local.max(), tol)
    # with "fit" the factor is the 99.5th percentile of the texels, i.e. about 2R, not the diagonal
    assert abs(factor - 2 * R) <= tol


def test_gltf_text_copy_in_another_folder(written):
    out = written["files"]["text"]
    doc = json.loads(out.read_text())
    image = doc["images"][0]
    assert (out.parent / image["uri"]).is_file()  # written beside the copy
    buffer_uri = doc["buffers"][0]["uri"]
    assert (out.parent / buffer_uri).resolve() == (written["src"] / "text" / "asset.bin").resolve()


def test_medium_sets_consistent_attenuation(written):
    # KHR_materials_volume: T(x) = attenuationColor^(x / attenuationDistance), x in world units; the
    # map's sidecar records exp(-sigma_tr * mm_per_unit * x) with glTF's metre (glTF 2.0 §3.5.1)
    doc, _ = ga.glb_parts(written["files"]["marble"].read_bytes())
    volume = doc["materials"][0]["extensions"]["KHR_materials_volume"]
    sigma_tr = get_medium("marble").sigma_tr * 1000.0  # per metre
    for x in (0.001, 0.02, 0.3):
        gltf = np.asarray(volume["attenuationColor"]) ** (x / volume["attenuationDistance"])
        np.testing.assert_allclose(gltf, np.exp(-sigma_tr * x), rtol=1e-12)
    side = json.loads((written["out"] / "figure.marble.json").read_text())
    assert side["medium"]["gltf_attenuation"]["attenuationColor"] == volume["attenuationColor"]


def test_non_gltf_input_is_refused(tmp_path):
    obj = shapes.write_shape_set(tmp_path, [shapes.box()])
    obj = next(p for p in obj if p.suffix == ".obj")
    proc = run("bake", obj, "-o", tmp_path / "m.png", "--size", 16, "--write-gltf", tmp_path / "m.glb")
    assert proc.returncode == 2
    assert "glTF" in proc.stderr and len(proc.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "m.png").exists() and not (tmp_path / "m.glb").exists()


def test_three_js_loads_the_written_files(written):
    # source: three.js GLTFLoader (npm three) in headless Chromium, the engine side of the extension
    bs.node_tools()                       # three.js is served from tests/browser/node_modules
    out = written["out"]
    glbs = {label: path for label, path in written["files"].items() if path.suffix == ".glb"}
    with bs.serve({"/three/": bs.NODE_MODULES / "three", "/check/": bs.BROWSER_DIR, "/files/": out}) as (base, results):
        names = ",".join(p.name for p in glbs.values())
        report = bs.run_page(f"{base}/check/volume_check.html?files={names}", results, timeout=60)
    assert report["errors"] == [], report["errors"]
    assert report["webgl"] and report["rendered"]
    by_file = {f["file"]: f for f in report["files"]}
    assert set(by_file) == {p.name for p in glbs.values()}
    for label, path in glbs.items():
        doc, bin_chunk = ga.glb_parts(path.read_bytes())
        loaded = by_file[path.name]
        assert loaded["glError"] == 0
        volume = doc["materials"][0]["extensions"]["KHR_materials_volume"]
        (wax,) = [m for m in loaded["materials"] if m["name"] == "wax"]
        assert wax["type"] == "MeshPhysicalMaterial"
        assert wax["thickness"] == volume["thicknessFactor"]
        tmap = wax["thicknessMap"]
        assert tmap["channel"] == volume["thicknessTexture"]["texCoord"] == 0
        assert "uv" in [m for m in loaded["meshes"] if m["name"] == "solid"][0]["uvAttributes"]
        # the G channel the engine reads holds the map: the browser decodes to 8 bits (16-bit codes
        # scaled by 255/65535; rounding or truncation, so within one 8-bit step)
        codes = _embedded_png(doc, bin_chunk, 0).astype(np.float64)
        top = 65535.0 if codes.max() > 255 else 255.0
        green = np.asarray(tmap["green"], np.float64).reshape(tmap["height"], tmap["width"])
        assert np.abs(green - codes / top * 255.0).max() <= 1.0
        stone = [m for m in loaded["materials"] if m["name"] == "stone"][0]
        assert stone["thicknessMap"] is None and not stone.get("thickness")  # untouched: no volume
        if label == "marble":
            np.testing.assert_allclose(wax["attenuationColor"], volume["attenuationColor"], rtol=1e-12)
            assert wax["attenuationDistance"] == volume["attenuationDistance"]
        factor_transmission = doc["materials"][0]["extensions"].get("KHR_materials_transmission", {})
        assert wax["transmission"] == factor_transmission.get("transmissionFactor", 0)


def test_three_js_samples_the_box_map_at_its_uvs(written):
    # Orientation: where three.js looks up the map (the UVs of each triangle, glTF's upper-left origin),
    # the G value × thicknessFactor must be the box's extent across that face (closed form), within one
    # 8-bit code step of the factor (the browser's 8-bit decode) — a flipped or mirrored map fails.
    bs.node_tools()                       # three.js is served from tests/browser/node_modules
    path = written["files"]["box"]
    with bs.serve({"/three/": bs.NODE_MODULES / "three", "/check/": bs.BROWSER_DIR,
                   "/files/": path.parent}) as (base, results):
        report = bs.run_page(f"{base}/check/volume_check.html?files={path.name}", results, timeout=60)
    assert report["errors"] == []
    doc, _ = ga.glb_parts(path.read_bytes())
    factor = doc["materials"][0]["extensions"]["KHR_materials_volume"]["thicknessFactor"]
    (solid,) = [m for m in report["files"][0]["meshes"] if m["name"] == "solid"]
    samples = np.asarray(solid["thicknessSamples"]["samples"], np.float64)
    assert len(samples) >= 12
    axis = np.argmax(np.abs(samples[:, :3]), axis=1)
    expected = np.asarray(BOX)[axis]
    measured = samples[:, 3] / 255.0 * factor
    assert np.abs(measured - expected).max() <= factor / 255.0 + 1e-9, np.c_[axis, measured, expected]
