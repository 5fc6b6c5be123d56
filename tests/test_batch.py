"""Batch baking of an asset folder: rules, incremental skips, failure isolation, crash safety, report, cluster.

The fixture library is generated here: the package's UV spheres (squashed, written as OBJ, GLB and PLY) in nested
folders, a GLB of garbage bytes, an OBJ without UVs and a rules file with an override.  Maps are tiny
(32–48 texels, 8–16 rays) so every bake takes milliseconds; what costs time is starting the pool.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import trimesh

from thickbake import cli
from thickbake.batch import plan as batch_plan
from thickbake.batch import runners
from thickbake.batch import schedule
from thickbake.checks import shapes
from thickbake.pipeline.load import file_sha256
from thickbake.maps.files import read_image
from thickbake.batch.rules import glob_regex

RULES = """\
# demo rules: small maps everywhere, a finer map for the garden
[defaults]
size = 32
rays = 8

[[rule]]
match = "garden/**"
size = 48
rays = 16
"""

GOOD = ["rock.obj", "garden/leaf.obj", "garden/beds/pebble.glb", "props/candle.glb", "props/bowl.ply"]
BROKEN = ["broken/corrupt.glb", "broken/flat_no_uv.obj"]


# ---------------------------------------------------------------------------- fixtures
def uv_sphere(radius=1.0, segments=12, squash=(1.0, 1.0, 1.0)) -> trimesh.Trimesh:
    """The package's UV-mapped sphere (thickbake.shapes), coarse and optionally squashed, without normals."""
    sphere = shapes.sphere(radius=radius, segments=segments).mesh
    return trimesh.Trimesh(sphere.vertices * np.asarray(squash), sphere.faces, process=False,
                           visual=trimesh.visual.TextureVisuals(uv=sphere.visual.uv))


def write_mesh(path: Path, mesh: trimesh.Trimesh, uv: bool = True) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    if path.suffix == ".obj":  # written by hand: no material files beside it
        lines = [f"v {x:.6f} {y:.6f} {z:.6f}" for x, y, z in mesh.vertices]
        if uv:
            lines += [f"vt {u:.6f} {v:.6f}" for u, v in mesh.visual.uv]
            lines += [f"f {a}/{a} {b}/{b} {c}/{c}" for a, b, c in mesh.faces + 1]
        else:
            lines += [f"f {a} {b} {c}" for a, b, c in mesh.faces + 1]
        path.write_text("\n".join(lines) + "\n")
    else:
        path.write_bytes(mesh.export(file_type=path.suffix[1:]))


def make_library(root: Path, rules: str = RULES) -> Path:
    src = root / "assets"
    write_mesh(src / "rock.obj", uv_sphere(1.0))
    write_mesh(src / "garden/leaf.obj", uv_sphere(1.0, squash=(1.0, 0.6, 0.1)))
    write_mesh(src / "garden/beds/pebble.glb", uv_sphere(0.5, squash=(1.0, 0.8, 0.5)))
    write_mesh(src / "props/candle.glb", uv_sphere(0.3, squash=(1.0, 1.0, 3.0)))
    write_mesh(src / "props/bowl.ply", uv_sphere(2.0, segments=18))
    (src / "broken").mkdir(parents=True)
    (src / "broken/corrupt.glb").write_bytes(np.random.default_rng(7).bytes(2000))
    write_mesh(src / "broken/flat_no_uv.obj", uv_sphere(1.0), uv=False)
    write_mesh(src / ".cache/ghost.obj", uv_sphere(1.0))        # hidden folder: never baked
    (src / "notes.txt").write_text("not a mesh\n")
    (src / "thickbake.toml").write_text(rules)
    return src


def run_cli(*argv) -> tuple[int, str, str]:
    """Drive the real entry point in this process; returns (exit code, stdout, stderr)."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = cli.main([str(a) for a in argv])
    return code, out.getvalue(), err.getvalue()


def maps_in(out: Path) -> dict[str, Path]:
    return {p.relative_to(out).as_posix(): p for p in sorted(out.rglob("*.thickness.png"))}


def report_of(out: Path) -> dict:
    return json.loads((out / "report.json").read_text())


def statuses(out: Path) -> dict[str, str]:
    return {row["source"]: row["status"] for row in report_of(out)["assets"]}


def assert_outputs_complete(out: Path) -> None:
    """Every visible file is a report or a map/sidecar pair whose sidecar vouches for the map's bytes."""
    visible = [p for p in out.rglob("*")
               if p.is_file() and not any(part.startswith(".") for part in p.relative_to(out).parts)]
    for path in visible:
        name = path.name
        if name in ("report.json", "report.html"):
            continue
        assert name.endswith((".thickness.png", ".thickness.json")), f"unexpected file {path}"
        partner = path.with_suffix(".json" if path.suffix == ".png" else ".png")
        if path.suffix == ".png":
            assert partner.is_file(), f"map without sidecar: {path}"
            sidecar = json.loads(partner.read_text())
            assert file_sha256(path) == sidecar["batch"]["map_sha256"]
            image = read_image(path)
            assert image.dtype == np.uint16 and image.shape == tuple(sidecar["size"][::-1])
        else:
            assert partner.is_file(), f"sidecar without map: {path}"


@pytest.fixture(scope="module")
def first_run(tmp_path_factory):
    """One batch over a fresh library, shared by the read-only tests."""
    root = tmp_path_factory.mktemp("batch")
    src = make_library(root)
    out = root / "maps"
    code, stdout, stderr = run_cli("batch", src, "-o", out)
    return {"src": src, "out": out, "code": code, "stdout": stdout, "stderr": stderr}


# ---------------------------------------------------------------------------- first run, report
def test_first_run_bakes_good_assets_and_records_failures(first_run):
    out = first_run["out"]
    assert first_run["code"] == 1, first_run["stderr"]
    assert sorted(maps_in(out)) == sorted(batch_plan.map_name(rel, "png") for rel in GOOD)
    assert statuses(out) == {**{rel: "baked" for rel in GOOD}, **{rel: "failed" for rel in BROKEN}}
    rows = {r["source"]: r for r in report_of(out)["assets"]}
    assert "does not start with the GLB magic" in rows["broken/corrupt.glb"]["error"]
    assert "no UV coordinates" in rows["broken/flat_no_uv.obj"]["error"]
    # one line per failure on stderr, the summary on stdout
    assert first_run["stderr"].count("thickbake: failed: broken/") == 2
    assert first_run["stdout"].strip().splitlines()[-1].startswith("batch: 5 baked, 0 skipped, 2 failed of 7 assets")
    assert not (out / ".cache").exists() and "ghost" not in json.dumps(report_of(out))
    assert_outputs_complete(out)


def test_rules_decide_each_assets_settings(first_run):
    out = first_run["out"]
    for rel, path in maps_in(out).items():
        sidecar = json.loads(path.with_suffix(".json").read_text())
        garden = rel.startswith("garden/")
        assert sidecar["size"] == ([48, 48] if garden else [32, 32])
        assert sidecar["rays"] == (16 if garden else 8)
        assert sidecar["batch"]["rules"] == ([1] if garden else [])
        assert sidecar["input"]["sha256"] == file_sha256(first_run["src"] / sidecar["batch"]["source"])


def test_report_json_has_figures_jobs_and_threads(first_run):
    report = report_of(first_run["out"])
    assert report["jobs"] == min(runners.available_cores(), len(GOOD) + len(BROKEN))
    assert report["threads_per_bake"] == max(1, runners.available_cores() // report["jobs"])
    expected = {"assets": 7, "baked": 5, "skipped": 0, "failed": 2, "not_started": 0}
    assert {key: report["totals"][key] for key in expected} == expected
    for row in report["assets"]:
        if row["status"] == "baked":
            assert 0 < row["coverage"] <= 1 and row["rays_per_second"] > 0 and row["seconds"] >= 0
            assert set(row["stats"]) == {"min", "mean", "max"} and len(row["settings_hash"]) == 64
        else:
            assert row["error"] and row["coverage"] is None


def test_html_report_is_a_self_contained_contact_sheet(first_run):
    page = (first_run["out"] / "report.html").read_text()
    assert page.count('src="data:image/png;base64,') == len(GOOD)
    assert "http://" not in page and "https://" not in page and "<link" not in page and "<script" not in page
    # failures first, with their error line
    first_failure = page.index("broken/corrupt.glb")
    assert first_failure < page.index("data:image/png;base64,")
    assert "no UV coordinates" in page


# ---------------------------------------------------------------------------- incremental
def test_second_run_skips_and_changes_rebake_only_what_they_touch(tmp_path):
    src = make_library(tmp_path)
    out = tmp_path / "maps"
    code, _, _ = run_cli("batch", src, "-o", out)
    assert code == 1
    before = {rel: p.read_bytes() for rel, p in maps_in(out).items()}
    before_mtimes = {rel: p.stat().st_mtime_ns for rel, p in maps_in(out).items()}   # a skip rewrites nothing

    # (how much faster the skipping run is, is measured by scripts/bench.py, not asserted here)
    code, stdout, _ = run_cli("batch", src, "-o", out)
    assert code == 1  # the two broken assets still fail
    assert statuses(out) == {**{rel: "skipped" for rel in GOOD}, **{rel: "failed" for rel in BROKEN}}
    assert {rel: p.read_bytes() for rel, p in maps_in(out).items()} == before
    assert {rel: p.stat().st_mtime_ns for rel, p in maps_in(out).items()} == before_mtimes
    # a failure is not retried while nothing about it changed
    reasons = {r["source"]: r["reason"] for r in report_of(out)["assets"]}
    assert reasons["broken/corrupt.glb"].startswith("unchanged since it failed")
    assert reasons["rock.obj"] == "up to date"
    # skipped assets stay on the contact sheet
    assert (out / "report.html").read_text().count("data:image/png;base64,") == len(GOOD)

    # change one mesh's bytes: exactly that one is baked again
    with open(src / "rock.obj", "a") as handle:
        handle.write("# touched\n")
    code, _, _ = run_cli("batch", src, "-o", out)
    now = statuses(out)
    assert [rel for rel, s in now.items() if s == "baked"] == ["rock.obj"]
    assert {r["source"]: r["reason"] for r in report_of(out)["assets"]}["rock.obj"] == "the mesh changed"

    # change a rule: exactly the assets it matches are baked again
    (src / "thickbake.toml").write_text(RULES.replace("rays = 16", "rays = 12"))
    code, _, _ = run_cli("batch", src, "-o", out)
    now = statuses(out)
    assert sorted(rel for rel, s in now.items() if s == "baked") == ["garden/beds/pebble.glb", "garden/leaf.obj"]
    assert all(s == "skipped" for rel, s in now.items() if rel in GOOD and not rel.startswith("garden/"))

    # --force bakes every good asset again, and the maps come out the same
    code, _, _ = run_cli("batch", src, "-o", out, "--force")
    assert sorted(rel for rel, s in statuses(out).items() if s == "baked") == sorted(GOOD)
    assert {r["source"]: r["reason"] for r in report_of(out)["assets"]}["broken/corrupt.glb"] == "--force"
    assert maps_in(out)["props/candle.thickness.png"].read_bytes() == before["props/candle.thickness.png"]


def test_dry_run_writes_nothing_and_says_why(first_run, tmp_path):
    fresh = tmp_path / "nowhere"
    code, stdout, _ = run_cli("batch", first_run["src"], "-o", fresh, "--dry-run")
    assert code == 0 and not fresh.exists()
    assert "rock.obj -> rock.thickness.png: bake (no map yet)" in stdout
    assert "size=48x48 rays=16" in stdout and "[rules: #1]" in stdout
    assert "nothing was written" in stdout

    out = first_run["out"]
    snapshot = {p: p.stat().st_mtime_ns for p in out.rglob("*")}
    code, stdout, _ = run_cli("batch", first_run["src"], "-o", out, "--dry-run")
    assert code == 0
    assert "garden/leaf.obj -> garden/leaf.thickness.png: skip (up to date)" in stdout
    assert {p: p.stat().st_mtime_ns for p in out.rglob("*")} == snapshot


# ---------------------------------------------------------------------------- rules file errors
@pytest.mark.parametrize("rules, expected", [
    (RULES.replace("rays = 16", "rayz = 16"), ["line 9", "unknown key 'rayz'", "[[rule]] #1", "did you mean 'rays'"]),
    (RULES.replace("rays = 8", "rays = 0"), ["line 4", "[defaults]", "rays = 0", "from 1 to 65536"]),
    (RULES.replace("size = 48", 'size = "big"'), ["line 8", "size 'big'"]),
    (RULES.replace("size = 32", 'measure = "depth"'),
     ["line 3", "measure", "'thickness' or 'transmittance' or 'occlusion'"]),
    (RULES + 'format = "jpg"\n', ["line 10", "format = 'jpg'", "'png' or 'tif'"]),
    ("rays = 8\n" + RULES, ["line 1", "unknown key 'rays' at the top level", "[defaults]"]),
    (RULES.replace('match = "garden/**"\n', ""), ["[[rule]] #1 has no 'match'"]),
    (RULES.replace("[defaults]", "[defaults"), ["not valid TOML", "line 2"]),
])
def test_bad_rules_exit_2_naming_the_key_and_bake_nothing(tmp_path, rules, expected):
    src = make_library(tmp_path, rules=rules)
    out = tmp_path / "maps"
    code, stdout, stderr = run_cli("batch", src, "-o", out)
    assert code == 2
    line = stderr.strip()
    assert "\n" not in line and str(src / "thickbake.toml") in line
    for text in expected:
        assert text in line, line
    assert not out.exists()


def test_bad_arguments_exit_2(tmp_path):
    code, _, stderr = run_cli("batch", tmp_path / "missing", "-o", tmp_path / "out")
    assert code == 2 and "no such folder" in stderr
    src = make_library(tmp_path)
    code, _, stderr = run_cli("batch", src, "-o", tmp_path / "out", "--config", tmp_path / "nope.toml")
    assert code == 2 and "no such rules file" in stderr
    code, _, stderr = run_cli("batch", src, "-o", tmp_path / "out", "--jobs", "0")
    assert code == 2 and "--jobs" in stderr
    code, _, stderr = run_cli("batch", src, "-o", src)
    assert code == 2 and "the output folder is the source folder" in stderr
    assert not (tmp_path / "out").exists()


def test_glob_semantics():
    assert glob_regex("garden/**").fullmatch("garden/beds/leaf.obj")
    assert glob_regex("**/leaf.obj").fullmatch("leaf.obj")
    assert glob_regex("**/leaf.obj").fullmatch("a/b/leaf.obj")
    assert not glob_regex("garden/*").fullmatch("garden/beds/leaf.obj")   # * stays in one folder
    assert glob_regex("garden/*").fullmatch("garden/leaf.obj")
    assert glob_regex("*.glb").fullmatch("candle.glb") and not glob_regex("*.glb").fullmatch("props/candle.glb")
    assert glob_regex("props/[!b]*.glb").fullmatch("props/candle.glb")
    assert not glob_regex("props/[!c]*.glb").fullmatch("props/candle.glb")
    assert glob_regex("./rock.ob?").fullmatch("rock.obj")
    assert not glob_regex("Rock.obj").fullmatch("rock.obj")                # case-sensitive
    with pytest.raises(ValueError):
        glob_regex("/abs/path.obj")


def test_output_inside_source_is_not_picked_up(tmp_path):
    src = make_library(tmp_path, rules="[defaults]\nsize = 16\nrays = 4\n")
    for rel in BROKEN:
        (src / rel).unlink()
    out = src / "baked"
    shutil.copy(src / "rock.obj", tmp_path / "copy.obj")
    code, _, _ = run_cli("batch", src, "-o", out, "--jobs", "1")
    assert code == 0
    (out / "stray.obj").write_bytes((tmp_path / "copy.obj").read_bytes())   # a mesh inside OUT is ignored
    plan = batch_plan.plan_batch(src, out)
    assert sorted(j.asset.rel for j in plan.jobs) == sorted(GOOD)
    assert all(j.status == "skipped" for j in plan.jobs)


@pytest.mark.parametrize("listed", [[1], "rock.thickness.png", ["../../outside.png"], None])
def test_a_hand_edited_list_of_maps_is_read_as_the_single_map(first_run, tmp_path, listed):
    # batch.maps that is not a list of plain file names (a number, a string, a path leading out of the
    # folder) reads as absent: the asset's single map is checked as usual, nothing is opened elsewhere
    src, out = tmp_path / "assets", tmp_path / "maps"
    shutil.copytree(first_run["src"], src)
    shutil.copytree(first_run["out"], out)
    side_path = out / "rock.thickness.json"
    side = json.loads(side_path.read_text())
    side["batch"]["maps"] = listed
    side_path.write_text(json.dumps(side))
    jobs = {j.asset.rel: j for j in batch_plan.plan_batch(src, out).jobs}
    assert jobs["rock.obj"].status == "skipped", jobs["rock.obj"].reason
    assert [m["map"] for m in jobs["rock.obj"].result.maps] == ["rock.thickness.png"]


def test_float_tiff_format_and_gltf_buffers_count_as_input(tmp_path):
    src = tmp_path / "assets"
    write_mesh(src / "rock.obj", uv_sphere(1.0))
    shell = uv_sphere(0.5)
    files = shell.export(file_type="gltf")                   # .gltf plus external .bin buffers
    for name, data in files.items():
        (src / "shell" / name).parent.mkdir(parents=True, exist_ok=True)
        (src / "shell" / name).write_bytes(data)
    (src / "thickbake.toml").write_text('[defaults]\nsize = 16\nrays = 4\n\n'
                                        '[[rule]]\nmatch = "shell/*"\nformat = "tif"\n')
    out = tmp_path / "maps"
    code, _, stderr = run_cli("batch", src, "-o", out)
    assert code == 0, stderr
    tif = out / "shell" / "model.thickness.tif"
    sidecar = json.loads((out / "shell" / "model.thickness.json").read_text())
    image = read_image(tif)
    assert image.dtype == np.float32 and image.shape == (16, 16)
    assert sidecar["encoding"]["format"].startswith("TIFF")
    assert abs(float(image.max()) - sidecar["stats"]["max"]) < 1e-6 * sidecar["stats"]["max"] + 1e-6
    assert (out / "report.html").read_text().count("data:image/png;base64,") == 2

    # the .gltf's own bytes are unchanged, but a buffer it loads is: that asset is baked again
    positions = len(shell.vertices) * 3 * 4
    buffer = next(p for p in (src / "shell").glob("*.bin") if p.stat().st_size == positions)
    data = bytearray(buffer.read_bytes())
    data[0:4] = np.float32(0.49).tobytes()                   # nudge one vertex coordinate
    buffer.write_bytes(bytes(data))
    code, _, _ = run_cli("batch", src, "-o", out)
    assert code == 0 and statuses(out) == {"rock.obj": "skipped", "shell/model.gltf": "baked"}


# ---------------------------------------------------------------------------- crash safety
SLOW_RULES = "[defaults]\nsize = 128\nrays = 64\n"


def slow_library(root: Path, count: int = 6) -> Path:
    src = root / "assets"
    for i in range(count):
        write_mesh(src / f"set{i % 2}/ball{i}.obj", uv_sphere(1.0 + 0.1 * i, segments=24))
    (src / "thickbake.toml").write_text(SLOW_RULES)
    return src


def start_batch(src: Path, out: Path) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "thickbake", "batch", str(src), "-o", str(out), "--jobs", "1", "-q"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, start_new_session=True)


def wait_for_first_sidecar(out: Path, proc: subprocess.Popen, timeout: float = 60) -> None:
    deadline = time.monotonic() + timeout
    while not list(out.rglob("*.thickness.json")):
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, "no asset finished in time"
        time.sleep(0.005)


def test_sigkill_mid_run_leaves_complete_outputs_and_rerun_resumes(tmp_path):
    src = slow_library(tmp_path)
    out = tmp_path / "maps"
    proc = start_batch(src, out)
    try:
        wait_for_first_sidecar(out, proc)
    finally:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.communicate()
    finished = len(maps_in(out))
    assert 1 <= finished < 6, "the kill should land mid-batch"
    assert not (out / "report.json").exists()
    assert_outputs_complete(out)

    code, stdout, _ = run_cli("batch", src, "-o", out)
    assert code == 0, stdout
    counts = report_of(out)["totals"]
    assert counts["skipped"] >= finished and counts["baked"] + counts["skipped"] == 6
    assert len(maps_in(out)) == 6
    assert not [p for p in out.rglob("*") if p.name.endswith(".tmp")]
    assert_outputs_complete(out)


def test_sigint_finishes_bakes_in_flight_writes_report_and_exits_130(tmp_path):
    src = slow_library(tmp_path)
    out = tmp_path / "maps"
    proc = start_batch(src, out)
    wait_for_first_sidecar(out, proc)
    os.killpg(proc.pid, signal.SIGINT)          # as Ctrl-C in a terminal: the whole process group
    _, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 130, stderr.decode()
    assert b"stopping" in stderr
    report = report_of(out)
    assert report["interrupted"] is True
    done = report["totals"]["baked"]
    assert 1 <= done < 6 and report["totals"]["not_started"] == 6 - done
    assert all(r["reason"].startswith("interrupted") for r in report["assets"] if r["status"] == "not started")
    assert len(maps_in(out)) == done
    assert_outputs_complete(out)

    code, _, _ = run_cli("batch", src, "-o", out)
    assert code == 0 and report_of(out)["totals"]["skipped"] == done and len(maps_in(out)) == 6


def test_leftover_temp_files_are_removed_at_start(first_run, tmp_path):
    out = tmp_path / "maps"
    shutil.copytree(first_run["out"], out)
    leftover = out / "garden" / ".leaf.thickness.png.k3j9x2ab.tmp"
    leftover.write_bytes(b"\x89PNG half a file")
    keep = out / "garden" / "notes.tmp"          # not one of ours
    keep.write_text("mine")
    code, _, _ = run_cli("batch", first_run["src"], "-o", out)
    assert code == 1 and not leftover.exists() and keep.exists()
    assert set(statuses(out).values()) == {"skipped", "failed"}


def test_a_second_batch_into_the_same_folder_is_refused(first_run, tmp_path):
    fcntl = pytest.importorskip("fcntl")
    out = tmp_path / "maps"
    out.mkdir()
    with open(out / schedule.LOCK_NAME, "w") as held:     # as if another batch were running
        fcntl.flock(held, fcntl.LOCK_EX)
        code, _, stderr = run_cli("batch", first_run["src"], "-o", out)
    assert code == 2 and "another 'thickbake batch' is writing into this folder" in stderr
    assert sorted(p.name for p in out.iterdir()) == [schedule.LOCK_NAME]


def crashing_worker(task: dict) -> dict:
    """Stands in for a bake that takes its process down (segfault, OOM kill) on one asset."""
    if task["source"].endswith("rock.obj"):
        os._exit(3)
    return runners.bake_asset(task)


def test_a_crashing_bake_fails_alone_and_the_rest_go_on(tmp_path):
    src = make_library(tmp_path)
    for rel in BROKEN:
        (src / rel).unlink()
    out = tmp_path / "maps"
    outcome = schedule.run_batch(src, out, jobs=2, worker=crashing_worker)
    assert outcome.exit_code == 1
    rows = {r["source"]: r for r in outcome.report["assets"]}
    assert rows["rock.obj"]["status"] == "failed" and "the bake process died" in rows["rock.obj"]["error"]
    assert all(rows[rel]["status"] == "baked" for rel in GOOD if rel != "rock.obj")


# ---------------------------------------------------------------------------- cluster
def test_cluster_run_gives_bit_identical_maps(first_run, tmp_path):
    distributed = pytest.importorskip("distributed")
    out = tmp_path / "cluster_maps"
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False, protocol="tcp", host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        address = cluster.scheduler_address
        assert address.startswith("tcp://127.0.0.1:")
        code, stdout, stderr = run_cli("batch", first_run["src"], "-o", out, "--cluster", address)
    assert code == 1, stderr
    assert statuses(out) == statuses(first_run["out"])
    local, remote = maps_in(first_run["out"]), maps_in(out)
    assert sorted(local) == sorted(remote) and len(local) == len(GOOD)
    for rel in local:
        assert np.array_equal(read_image(local[rel]), read_image(remote[rel])), rel
        assert local[rel].read_bytes() == remote[rel].read_bytes(), rel
    report = report_of(out)
    assert report["cluster"] == address and report["threads_per_bake"] is None
    assert "on the cluster" in stdout


def test_cluster_address_that_answers_nothing_is_an_argument_error(first_run, tmp_path, monkeypatch):
    pytest.importorskip("distributed")
    monkeypatch.setattr(runners, "CLUSTER_CONNECT_SECONDS", 2)
    import socket

    with socket.socket() as probe:       # a free loopback port with nobody listening
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    out = tmp_path / "maps"
    code, _, stderr = run_cli("batch", first_run["src"], "-o", out, "--cluster", f"tcp://127.0.0.1:{port}")
    assert code == 2 and "cannot reach the dask scheduler" in stderr
    assert not out.exists()
