"""Several maps per asset through the command line and the batch: names, sidecars, warnings, --strict."""

import json
import subprocess
import sys

import pytest
import trimesh

from thickbake.checks import shapes
from thickbake.maps.naming import default_name, material_labels, name_fields, render


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "thickbake", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd, timeout=300)


TINY = ("--size", "24", "--rays", "4")


def _with_material(mesh, name):
    material = trimesh.visual.material.PBRMaterial(name=name)
    return trimesh.Trimesh(mesh.vertices, mesh.faces, vertex_normals=mesh.vertex_normals,
                           visual=trimesh.visual.TextureVisuals(uv=mesh.visual.uv, material=material), process=False)


@pytest.fixture(scope="module")
def car(tmp_path_factory):
    """A glTF with two materials ("body paint" and "wheel"), each a sphere with full-square UVs."""
    folder = tmp_path_factory.mktemp("car")
    big, small = shapes.sphere(1.0, segments=24).mesh, shapes.sphere(0.4, segments=24).mesh
    scene = trimesh.Scene()
    scene.add_geometry(_with_material(big, "body paint"), node_name="body")
    scene.add_geometry(_with_material(small, "wheel"), node_name="wheel",
                       transform=trimesh.transformations.translation_matrix((3, 0, 0)))
    path = folder / "car.glb"
    path.write_bytes(scene.export(file_type="glb"))
    return path


def test_naming_rules():
    keys = [{"material": "body paint", "material_index": 0, "uv_set": 0, "tile": 1001},
            {"material": "body/paint", "material_index": 1, "uv_set": 0, "tile": 1002},
            {"material": None, "material_index": None, "uv_set": 0, "tile": None}]
    assert material_labels(keys) == ["body_paint-0", "body_paint-1", "nomaterial"]  # a clash names both
    fields = name_fields("car", "thickness", keys)
    assert [default_name(f) for f in fields] == ["car.body_paint-0.1001.thickness.png", "car.body_paint-1.1002.thickness.png",
                                                 "car.nomaterial.thickness.png"]
    assert render("{stem}_{material}_{tile}.tif", fields[2]) == "car_nomaterial.tif"
    one = name_fields("leaf", "occlusion", [{"material": "leaf", "material_index": 0, "uv_set": 2, "tile": None}])
    assert default_name(one[0]) == "leaf.uv2.occlusion.png"  # one material: no material part


def test_bake_writes_one_named_map_per_material(car, tmp_path):
    proc = run("bake", car, "-o", f"{tmp_path}/", *TINY)
    assert proc.returncode == 0, proc.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "car.body_paint.thickness.json", "car.body_paint.thickness.png", "car.wheel.thickness.json", "car.wheel.thickness.png"]
    side = json.loads((tmp_path / "car.wheel.thickness.json").read_text())
    assert side["map_of"] == {"material": "wheel", "uv_set": 0, "tile": None} and side["blockers"] == "all"
    assert len(proc.stdout.strip().splitlines()) == 2  # one summary line per map
    # a plain file name gets each map's label; a pattern its placeholders
    assert run("bake", car, "-o", tmp_path / "m" / "car.tif", *TINY).returncode == 0
    assert sorted(p.name for p in (tmp_path / "m").glob("*.tif")) == ["car.body_paint.tif", "car.wheel.tif"]
    assert run("bake", car, "-o", tmp_path / "p" / "{material}-{measure}.png", "--blockers", "own", *TINY).returncode == 0
    assert sorted(p.name for p in (tmp_path / "p").glob("*.png")) == ["body_paint-thickness.png", "wheel-thickness.png"]
    # a pattern that gives both maps one name is refused before anything is written
    proc = run("bake", car, "-o", tmp_path / "q" / "{stem}.png", *TINY)
    assert proc.returncode == 2 and "same name" in proc.stderr and not (tmp_path / "q").exists()


def test_strict_turns_warnings_into_failure(tmp_path):
    # an open single-sided sheet: every ray leaves the mesh (warning), the mesh is not closed (warning)
    sheet = tmp_path / "sheet.obj"
    sheet.write_text("v 0 0 0\nv 1 0 0\nv 1 1 0\nv 0 1 0\nvt 0 0\nvt 1 0\nvt 1 1\nvt 0 1\nf 1/1 2/2 3/3\nf 1/1 3/3 4/4\n")
    plain = run("bake", sheet, *TINY)
    assert plain.returncode == 0 and "left the mesh" in plain.stderr
    strict = run("bake", sheet, "--strict", *TINY)
    assert strict.returncode == 1 and "--strict" in strict.stderr
    assert (tmp_path / "sheet.thickness.png").exists()


def test_batch_lists_every_map_and_keeps_warnings_when_skipping(car, tmp_path):
    src = tmp_path / "src"
    (src / "vehicles").mkdir(parents=True)
    (src / "vehicles" / "car.glb").write_bytes(car.read_bytes())
    (src / "sheet.obj").write_text("v 0 0 0\nv 1 0 0\nv 1 1 0\nv 0 1 0\nvt 0 0\nvt 1 0\nvt 1 1\nvt 0 1\n"
                                   "f 1/1 2/2 3/3\nf 1/1 3/3 4/4\n")
    (src / "thickbake.toml").write_text("[defaults]\nsize = 24\nrays = 4\n")
    out = tmp_path / "out"
    first = run("batch", src, "-o", out)
    assert first.returncode == 0, first.stderr
    assert "(3 maps)" in first.stdout and "warnings" in first.stdout
    for attempt in ("baked", "skipped"):
        report = json.loads((out / "report.json").read_text())
        rows = {r["source"]: r for r in report["assets"]}
        assert rows["vehicles/car.glb"]["status"] == attempt
        assert [m["map"] for m in rows["vehicles/car.glb"]["maps"]] == [
            "vehicles/car.body_paint.thickness.png", "vehicles/car.wheel.thickness.png"]
        assert [m["map_of"]["material"] for m in rows["vehicles/car.glb"]["maps"]] == ["body paint", "wheel"]
        sheet = rows["sheet.obj"]
        assert any("left the mesh" in w for w in sheet["warnings"]) and any("not closed" in w for w in sheet["warnings"])
        assert report["totals"]["warnings"] == len(sheet["warnings"]) and report["totals"]["maps"] == 3
        html = (out / "report.html").read_text()
        assert html.count('class="card') == 3 and "left the mesh" in html
        second = run("batch", src, "-o", out, "--strict")
    assert second.returncode == 1 and "--strict" in second.stderr


def test_verify_judges_uv_figures_per_map(car):
    # two spheres of different radii, each with its own material and full-square UVs: each map's texel
    # density is even (the UV sphere's layout distortion is at most 1.21 per island, surfaces.py), so
    # the density row must not warn although the two materials differ 6x in area per texel
    from thickbake.checks.verify import verify_asset

    rows = {c.quantity: c for c in verify_asset(str(car), {"size": 48, "rays": 8}).checks}
    assert rows["texel density spread p95/p5"].status == "info"
    assert rows["UV overlap"].measured == 0
    assert rows["Cauchy mean chord 4V/S"].status == "skip" and "2 maps" in rows["Cauchy mean chord 4V/S"].note
