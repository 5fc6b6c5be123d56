"""What a batch may open, Ctrl-C at any moment, failing reports and pipes, and the library's types.

The refusals of single malformed inputs are in ``test_fuzz.py``; this file checks the behaviours
that need a folder, a signal or the library API.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import site
import subprocess
import sys
import sysconfig
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import pytest

import thickbake
from thickbake.batch import plan as batch_plan
from thickbake.batch import schedule
from thickbake.batch.runners import bake_asset
from thickbake.checks import shapes
from test_fuzz import FAST, gltf_variant, obj_text, write

ROOT = Path(__file__).resolve().parents[1]


def run_cli(*args, cwd=None, **kwargs):
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.run([sys.executable, "-m", "thickbake", *map(str, args)], capture_output=True, text=True,
                          env=env, cwd=cwd, timeout=300, stdin=subprocess.DEVNULL, **kwargs)


def library(root: Path) -> tuple[Path, Path]:
    """SRC with a good OBJ, a good .gltf, a .gltf whose buffer URI escapes (with a same-named decoy in
    its folder), and a link to a mesh outside SRC; returns (SRC, the outside folder)."""
    src = root / "src"
    outside = root / "outside"
    (src / "good").mkdir(parents=True)
    (src / "escape").mkdir()
    outside.mkdir()
    write(src / "thickbake.toml", "[defaults]\nsize = 16\nrays = 4\n")
    write(src / "good" / "tetra.obj", obj_text())
    gltf_variant(src / "good", lambda doc, f: None)

    def escape(doc, folder):
        name = doc["buffers"][0]["uri"]
        (outside / name).write_bytes((folder / name).read_bytes())  # folder keeps a same-named decoy
        doc["buffers"][0]["uri"] = f"../../outside/{name}"

    gltf_variant(src / "escape", escape)
    write(outside / "secret.obj", obj_text())
    os.symlink(outside / "secret.obj", src / "linked.obj")
    return src, outside


# ---------------------------------------------------------------------------- confinement
class OpenRecorder:
    """Every path passed to open()/os.open() while active (sys.addaudithook's "open" event, PEP 578).
    An audit hook cannot be removed, so it stays installed but records only while active."""

    installed = None

    def __init__(self):
        self.paths: list[str] = []
        self.active = False

    def __enter__(self):
        if OpenRecorder.installed is None:
            OpenRecorder.installed = []
            sys.addaudithook(lambda event, args: [r._event(event, args) for r in OpenRecorder.installed])
        OpenRecorder.installed.append(self)
        self.active = True
        return self

    def __exit__(self, *exc):
        self.active = False
        OpenRecorder.installed.remove(self)

    def _event(self, event, args):
        if self.active and event == "open" and args and isinstance(args[0], (str, bytes, os.PathLike)):
            path = os.fsdecode(args[0])
            self.paths.append(os.path.realpath(path) if os.path.isabs(path) else os.path.realpath(os.path.join(os.getcwd(), path)))


def allowed_roots(src: Path, out: Path) -> list[str]:
    """Where a batch may open files: SRC, OUT, the package, Python's own files, devices and /proc."""
    roots = {str(src), str(out), str(Path(thickbake.__file__).resolve().parent), sys.prefix, sys.base_prefix,
             sys.exec_prefix, *site.getsitepackages(), site.getusersitepackages(), "/dev/", "/proc/", "/sys/"}
    roots |= {p for p in sysconfig.get_paths().values()}
    # the package's own distribution metadata: an editable or in-tree install keeps it beside the
    # package (thickbake.egg-info), where importlib.metadata reads entry points from it
    roots |= {str(p) for p in Path(thickbake.__file__).resolve().parents[1].glob("*.egg-info")}
    return [os.path.realpath(r) for r in roots if r]


def outside_of(paths, roots) -> list[str]:
    return sorted({p for p in paths if not any(p == r or p.startswith(r.rstrip("/") + "/") for r in roots)})


def test_batch_opens_nothing_outside_its_folders(tmp_path):
    """Plan (as --dry-run does), run, and every per-asset bake in this process: every opened path lies
    in SRC, OUT, the package or Python's own files — not the outside folder, not /etc."""
    src, outside = library(tmp_path)
    out = tmp_path / "out"
    roots = allowed_roots(src.resolve(), out.resolve())
    with OpenRecorder() as recorder:
        plan = batch_plan.plan_batch(src, out)
    assert outside_of(recorder.paths, roots) == []
    assert [w for w in plan.warnings if "linked.obj" in w and "outside" in w]
    assert "linked.obj" not in [j.asset.rel for j in plan.jobs]
    rows = {j.asset.rel: j for j in plan.jobs}
    assert rows["escape/model.gltf"].status == "failed"
    assert "outside the asset's folder" in rows["escape/model.gltf"].result.error

    # each bake, run here rather than in a pool process so that the hook sees its opens
    with OpenRecorder() as recorder:
        results = {job.asset.rel: bake_asset(schedule.worker_task(plan, job, 1)) for job in plan.jobs}
    assert outside_of(recorder.paths, roots) == []
    assert results["good/tetra.obj"]["status"] == "baked"
    assert results["good/model.gltf"]["status"] == "baked"
    # the escaping URI fails the asset; the same-named decoy beside it is not used
    assert results["escape/model.gltf"]["status"] == "failed"
    assert "outside the asset's folder" in results["escape/model.gltf"]["error"]

    with OpenRecorder() as recorder:
        outcome = schedule.run_batch(src, out, jobs=1)
    assert outside_of(recorder.paths, roots) == []
    assert outcome.exit_code == 1
    statuses = {j.asset.rel: j.status for j in outcome.plan.jobs}
    assert statuses == {"good/tetra.obj": "baked", "good/model.gltf": "baked", "escape/model.gltf": "failed"}
    assert not list(out.rglob("secret*")) and not list(out.rglob("linked*"))


def test_the_recorder_sees_an_outside_open(tmp_path):
    """The confinement test can fail: a read of the outside folder is reported."""
    src, outside = library(tmp_path)
    with OpenRecorder() as recorder:
        (outside / "secret.obj").read_bytes()
    assert outside_of(recorder.paths, allowed_roots(src, tmp_path / "out")) == [str((outside / "secret.obj").resolve())]


def test_cli_batch_warns_about_a_link_leaving_src(tmp_path):
    src, _ = library(tmp_path)
    proc = run_cli("batch", src, "-o", tmp_path / "out", "--dry-run")
    assert proc.returncode == 0, proc.stderr
    warnings = [line for line in proc.stderr.splitlines() if "linked.obj" in line]
    assert len(warnings) == 1 and warnings[0].startswith("thickbake: warning:") and "outside" in warnings[0]
    assert "escape/model.gltf" in proc.stdout and "outside the asset's folder" in proc.stdout
    assert not (tmp_path / "out").exists()


def test_a_fifo_in_the_source_folder_fails_only_that_asset(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    write(src / "thickbake.toml", "[defaults]\nsize = 16\nrays = 4\n")
    write(src / "tetra.obj", obj_text())
    os.mkfifo(src / "pipe.obj")
    proc = run_cli("batch", src, "-o", tmp_path / "out", "--jobs", "1")
    assert proc.returncode == 1, proc.stderr
    assert "FIFO" in proc.stderr and "Traceback" not in proc.stderr
    assert (tmp_path / "out" / "tetra.thickness.png").is_file()


# ---------------------------------------------------------------------------- Ctrl-C and failures
@pytest.mark.parametrize("delay", [0.1, 0.2, 0.5, 1.0, 2.0])
def test_ctrl_c_at_any_moment_of_a_batch(tmp_path, delay):
    """SIGINT to the whole process group, as a terminal's Ctrl-C, at start-up, while the pool starts
    and while bakes run: exit 130 and at most two lines on stderr, or (when the batch was faster
    than the signal) a normal exit.  A signal that arrives before Python has installed its handler
    ends the process as the signal does (-SIGINT, which shells also report as 130)."""
    src = tmp_path / "src"
    src.mkdir()
    write(src / "thickbake.toml", "[defaults]\nsize = 16\nrays = 4\n")
    for i in range(4):
        write(src / f"tetra{i}.obj", obj_text())
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.Popen([sys.executable, "-m", "thickbake", "batch", src, "-o", tmp_path / "out", "--jobs", "2"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
                            start_new_session=True, stdin=subprocess.DEVNULL)
    time.sleep(delay)
    try:
        os.killpg(proc.pid, signal.SIGINT)
    except ProcessLookupError:
        pass  # already finished
    stdout, stderr = proc.communicate(timeout=300)
    if "init_import_site" in stderr:
        pytest.skip("on this loaded machine the signal came while Python itself was starting, before any "
                    "code of thickbake ran")
    assert "Traceback" not in stderr, stderr
    assert proc.returncode in (0, 130, -signal.SIGINT), stderr
    assert len(stderr.splitlines()) <= 2, stderr
    if proc.returncode == 130 and "batch:" in stdout:  # the report was written for what was done
        assert (tmp_path / "out" / "report.json").is_file()


def test_a_report_that_cannot_be_written_is_one_line_and_exit_1(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    write(src / "thickbake.toml", "[defaults]\nsize = 16\nrays = 4\n")
    write(src / "tetra.obj", obj_text())
    out = tmp_path / "out"
    (out / "report.json").mkdir(parents=True)  # a folder where the report goes: the rename fails
    proc = run_cli("batch", src, "-o", out, "--jobs", "1")
    assert proc.returncode == 1, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("thickbake: error:") and "report" in lines[0], proc.stderr
    # the map and its sidecar were written and agree
    data = (out / "tetra.thickness.png").read_bytes()
    side = json.loads((out / "tetra.thickness.json").read_text())
    import hashlib

    assert side["map_sha256"] == hashlib.sha256(data).hexdigest()


def test_a_closed_stdout_is_a_quiet_exit(tmp_path):
    mesh = write(tmp_path / "tetra.obj", obj_text())
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    read_end, write_end = os.pipe()
    os.close(read_end)  # nobody will read what the command prints
    proc = subprocess.run([sys.executable, "-m", "thickbake", "bake", mesh, "-o", tmp_path / "m.png", *FAST],
                          stdout=write_end, stderr=subprocess.PIPE, text=True, env=env, timeout=300)
    os.close(write_end)
    assert proc.returncode == 0 and proc.stderr == ""


def test_another_broken_pipe_is_an_internal_error(monkeypatch, capsys, tmp_path):
    from thickbake.cli import bake as bake_cmd
    from thickbake.cli.main import main

    def broken(args):
        raise BrokenPipeError(32, "Broken pipe")  # e.g. a pipe to a helper process, not stdout

    monkeypatch.setattr(bake_cmd, "run", broken)
    code = main(["bake", str(tmp_path / "x.obj")])
    err = capsys.readouterr().err
    assert code == 70 and err.startswith("thickbake: error: internal error") and len(err.splitlines()) == 1


# ---------------------------------------------------------------------------- map and sidecar pairs
def test_a_map_beside_an_older_sidecar_is_refused(tmp_path):
    """What a kill between the two renames leaves: the new map beside the previous sidecar."""
    from thickbake.checks.compare import load_map

    mesh = shapes.sphere(segments=12).mesh
    thickbake.bake(mesh, size=16, rays=4, seed=1).write(tmp_path / "a.png")
    old_side = (tmp_path / "a.json").read_text()
    thickbake.bake(mesh, size=16, rays=4, seed=2).write(tmp_path / "a.png")
    load_map(tmp_path / "a.png")  # a consistent pair reads
    (tmp_path / "a.json").write_text(old_side)
    with pytest.raises(thickbake.ThickbakeError, match="do not belong together"):
        load_map(tmp_path / "a.png")


# ---------------------------------------------------------------------------- library types
@pytest.mark.parametrize("mesh", [None, 3, b"x.obj", np.zeros((4, 3)), {"vertices": []}])
def test_bake_names_the_argument_for_a_wrong_mesh_type(mesh):
    with pytest.raises(TypeError, match=r"^mesh must be .*not (NoneType|int|bytes|ndarray|dict)$"):
        thickbake.bake(mesh, size=16, rays=4)


def test_bake_refuses_an_open_file(tmp_path):
    path = write(tmp_path / "t.obj", obj_text())
    with open(path, "rb") as handle, pytest.raises(TypeError, match="mesh must be"):
        thickbake.bake(handle, size=16, rays=4)


def test_numpy_scalars_are_accepted_and_give_the_same_map():
    mesh = shapes.sphere(segments=12).mesh
    plain = thickbake.bake(mesh, size=16, rays=4, seed=7, supersample=1, bits=8, pad=2, cone=60.0, reach=3.0)
    numpy = thickbake.bake(mesh, size=np.int64(16), rays=np.int32(4), seed=np.uint64(7), supersample=np.int8(1),
                           bits=np.int16(8), pad=np.int64(2), cone=np.float32(60.0), reach=np.float64(3.0))
    assert numpy.settings == plain.settings
    assert np.array_equal(numpy.codes(), plain.codes())


@pytest.mark.parametrize("field", ["rays", "seed", "supersample", "bits", "pad", "size", "cone", "reach"])
def test_bools_are_not_numbers(field):
    with pytest.raises(thickbake.ThickbakeError, match=field):
        thickbake.BakeSettings(**{field: True})


@pytest.mark.parametrize("seed, ok", [(0, True), (2**64 - 1, True), (2**64, False), (-1, False)])
def test_seed_range(seed, ok):
    if ok:
        assert thickbake.BakeSettings(seed=seed).seed == seed
    else:
        with pytest.raises(thickbake.ThickbakeError, match="18446744073709551615"):
            thickbake.BakeSettings(seed=seed)


def test_largest_seed_bakes():
    result = thickbake.bake(shapes.sphere(segments=12).mesh, size=16, rays=4, seed=2**64 - 1)
    assert result.covered.any()


def test_obj_prescan_gives_the_same_answer_in_any_chunk_size(monkeypatch):
    """The OBJ pre-scan reads bounded chunks; the line it names must not depend on where they are cut."""
    from thickbake.pipeline import validate

    lines = [f"v {i} {i % 7} {i % 3}" for i in range(200)] + [f"  f {i + 1} {i + 2} -{1 + i % 5}" for i in range(190)]
    good = ("\n".join(lines) + "\n").encode()
    bad = good + b"f 1 2 201\n"
    for chunk in (37, 64, 1000, 1 << 20):
        monkeypatch.setattr(validate, "_OBJ_CHUNK_BYTES", chunk)
        validate.check_obj(good, "good.obj")
        with pytest.raises(thickbake.ThickbakeError, match="line 391: a face refers to vertex 201 but the file defines only 200"):
            validate.check_obj(bad, "bad.obj")
