"""The command line as a user meets it: real subprocesses in a temporary folder."""

import json
import subprocess
import sys

import numpy as np
import pytest

from thickbake.checks import shapes


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "thickbake", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd, timeout=300)


@pytest.fixture(scope="module")
def box_obj(tmp_path_factory):
    folder = tmp_path_factory.mktemp("assets")
    paths = shapes.write_shape_set(folder, [shapes.box()])
    return next(p for p in paths if p.suffix == ".obj")


def test_bake_writes_map_sidecar_and_summary(box_obj, tmp_path):
    out = tmp_path / "box_thickness.png"
    proc = run("bake", box_obj, "-o", out, "--size", "64", "--rays", "16")
    assert proc.returncode == 0, proc.stderr
    assert out.exists() and out.with_suffix(".json").exists()
    side = json.loads(out.with_suffix(".json").read_text())
    assert side["input"]["file"] == box_obj.name and len(side["input"]["sha256"]) == 64
    assert side["settings"]["rays"] == 16 and side["size"] == [64, 64]
    line = proc.stdout.strip()
    assert "64x64" in line and "rays/s" in line and "covered" in line and "min" in line and "max" in line
    # nothing else is left behind (temporary files renamed away)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["box_thickness.json", "box_thickness.png"]


def test_help_is_fast_and_lists_commands():
    proc = run("--help")
    assert proc.returncode == 0
    for command in ("bake", "verify", "shapes", "compare", "batch"):
        assert command in proc.stdout
    proc = run("bake", "--help")
    assert "--attenuation-distance" in proc.stdout and "quarter" in proc.stdout


def _obj(path, text):
    path.write_text(text)
    return path


BAD_INPUTS = {
    "missing": (lambda d: d / "nope.obj", "no such file"),
    "unreadable": (lambda d: (d / "broken.glb").write_bytes(b"glTF\x02\x00\x00\x00garbage") and d / "broken.glb",
                   "too short for a GLB"),
    "no_uv": (lambda d: _obj(d / "nouv.obj", "v 0 0 0\nv 1 0 0\nv 0 1 0\nv 0 0 1\nf 1 3 2\nf 1 2 4\nf 1 4 3\nf 2 3 4\n"),
              "no UV"),
    "zero_uv_area": (lambda d: _obj(d / "flatuv.obj", "v 0 0 0\nv 1 0 0\nv 0 1 0\nv 0 0 1\nvt 0.5 0.5\n"
                                    "f 1/1 3/1 2/1\nf 1/1 2/1 4/1\nf 1/1 4/1 3/1\nf 2/1 3/1 4/1\n"), "zero area"),
    "empty": (lambda d: _obj(d / "empty.obj", "v 0 0 0\nv 1 0 0\n"), "no triangle"),
    "nan": (lambda d: _obj(d / "nan.obj", "v 0 0 0\nv nan 0 0\nv 0 1 0\nv 0 0 1\nvt 0 0\nvt 1 0\nvt 0 1\nvt 1 1\n"
                           "f 1/1 3/3 2/2\nf 1/1 2/2 4/4\nf 1/1 4/4 3/3\nf 2/2 3/3 4/4\n"), "NaN"),
}


@pytest.mark.parametrize("case", sorted(BAD_INPUTS))
def test_bad_mesh_exit_2_one_line_no_output(case, tmp_path):
    make, expected = BAD_INPUTS[case]
    mesh = make(tmp_path)
    out = tmp_path / "out" / "map.png"
    proc = run("bake", mesh, "-o", out, "--size", "32")
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr
    assert expected.lower() in lines[0].lower() and mesh.name in lines[0]
    assert not out.exists() and not out.with_suffix(".json").exists()


@pytest.mark.parametrize("size, expected", [("0", "positive"), ("-5", "positive"), ("30000", "GiB"),
                                            ("99999", "larger than"), ("abc", "not a number")])
def test_bad_size_exit_2(box_obj, tmp_path, size, expected):
    out = tmp_path / "map.png"
    proc = run("bake", box_obj, "-o", out, "--size", size)
    assert proc.returncode == 2
    assert len(proc.stderr.strip().splitlines()) == 1 and expected in proc.stderr
    assert not out.exists()


def test_bad_option_values_exit_2(box_obj, tmp_path):
    for args in (["--rays", "0"], ["--cone", "120"], ["--reach", "-1"], ["--pad", "wide"], ["--bits", "12"]):
        proc = run("bake", box_obj, "-o", tmp_path / "m.png", *args)
        assert proc.returncode == 2, args
        assert len(proc.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "m.png").exists()


def test_error_out_and_tiff(box_obj, tmp_path):
    proc = run("bake", box_obj, "-o", tmp_path / "m.tif", "--size", "32", "--rays", "8",
               "--error-out", tmp_path / "m_err.tif")
    assert proc.returncode == 0, proc.stderr
    side = json.loads((tmp_path / "m.json").read_text())
    assert side["encoding"]["scale"] == 1.0 and side["error_map"] == "m_err.tif"
    from thickbake.maps.files import read_image
    err = read_image(tmp_path / "m_err.tif")
    assert err.dtype == np.float32 and err.max() > 0


def test_batch_dry_run_on_bundled_samples(tmp_path):
    # the README's batch command on samples/, as a dry run: the rules file gives the leaf its own measure
    from pathlib import Path

    samples = Path(__file__).resolve().parent.parent / "samples"
    out = tmp_path / "out"
    proc = run("batch", samples, "-o", out, "--dry-run")
    assert proc.returncode == 0, proc.stderr
    assert "garden/leaf.obj -> garden/leaf.transmittance.png: bake" in proc.stdout
    assert "candle.glb -> candle.thickness.png: bake" in proc.stdout
    assert not out.exists()


def test_output_targets_checked_before_baking(box_obj, tmp_path):
    # every file a bake would write is checked first: no traceback, exit 2, nothing left behind
    (tmp_path / "a.json").mkdir()                     # the sidecar's name is taken by a folder
    (tmp_path / "e.tif").mkdir()                      # so is the error map's
    (tmp_path / "afile").write_text("")               # a file where a folder should be
    cases = [(["-o", tmp_path / "a.png"], "sidecar"),
             (["-o", tmp_path / "b.png", "--error-out", tmp_path / "e.tif"], "error map"),
             (["-o", tmp_path / "afile" / "x.png"], "not a folder")]
    for args, expected in cases:
        proc = run("bake", box_obj, "--size", "16", "--rays", "4", *args)
        assert proc.returncode == 2 and expected in proc.stderr and "Traceback" not in proc.stderr
        assert len(proc.stderr.strip().splitlines()) == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.json", "afile", "e.tif"]
    # a PNG and a TIFF of the same stem would share one sidecar: the second is refused
    assert run("bake", box_obj, "--size", "16", "--rays", "4", "-o", tmp_path / "c.png").returncode == 0
    proc = run("bake", box_obj, "--size", "16", "--rays", "4", "-o", tmp_path / "c.tif")
    assert proc.returncode == 2 and "c.json already describes c.png" in proc.stderr
    assert not (tmp_path / "c.tif").exists()


@pytest.mark.parametrize("sample", ["candle.glb", "garden/leaf.obj", "garden/pebble.obj"])
def test_bundled_samples_are_fit_for_baking(sample):
    # the demo assets are closed and outward-wound; the leaf's blade-thin rim must not read as a hole
    from pathlib import Path

    path = Path(__file__).resolve().parent.parent / "samples" / sample
    proc = run("verify", path, "--size", "128", "--rays", "32", "--json", "-")
    assert proc.returncode == 0, proc.stdout[-2000:]
    report = json.loads(proc.stdout)
    assert report["passed"] is True and report["verdict"] == "fit for baking"
