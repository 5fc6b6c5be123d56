"""Hostile and careless input: every case is a clean one-line refusal, exit 2, nothing written.

Each case below builds a malformed file, a file system object named like a mesh, or an option value
outside the accepted range (README, "What input is refused"), runs the real command line in a
subprocess with a time limit, and requires: exit code 2, exactly one line on stderr starting with
``thickbake: error:``, no traceback, and an empty output folder.  The time limit is a hang guard
(a FIFO read blocks forever), not a performance assertion.  Cases run in a small thread pool since
each one is a separate Python process.
"""

from __future__ import annotations

import base64
import json
import os
import socket
import struct
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
#: A hang guard, not a performance bound: the slowest case (load a tiny mesh, bake 16x16) takes
#: about a second on an idle machine; a hang (a FIFO read) never ends.
TIMEOUT_SECONDS = 60
FAST = ["--size", "16", "--rays", "4"]

# A tetrahedron (counter-clockwise from outside, so its volume is positive) whose four faces each
# get their own UV triangle in one quadrant of the unit square.  The OBJ has 4 'v' lines, 12 'vt'
# lines and 4 'f' lines (lines 17-20), so text appended by a case starts on line 21.
TETRA_V = [(0, 0, 0), (1, 0, 0), (0, 1, 0), (0, 0, 1)]
TETRA_F = [(1, 3, 2), (1, 2, 4), (1, 4, 3), (2, 3, 4)]
TETRA_VT = [(qx + a, qy + b) for qx, qy in ((0, 0), (0.5, 0), (0, 0.5), (0.5, 0.5))
            for a, b in ((0.05, 0.05), (0.45, 0.05), (0.05, 0.45))]


def obj_text(vertices=TETRA_V, faces=TETRA_F, extra: str = "") -> str:
    lines = [f"v {' '.join(repr(float(c)) for c in v)}" for v in vertices]
    lines += [f"vt {u} {v}" for u, v in TETRA_VT]
    lines += [f"f {' '.join(f'{i}/{3 * k + j + 1}' for j, i in enumerate(f))}" for k, f in enumerate(faces)]
    return "\n".join(lines) + "\n" + extra


def tetra_mesh():
    """The same tetrahedron as a trimesh object, UVs per corner (vertices split per face)."""
    import trimesh

    corners = np.array(TETRA_F) - 1
    vertices = np.array(TETRA_V, float)[corners.reshape(-1)]
    mesh = trimesh.Trimesh(vertices, np.arange(12).reshape(4, 3), process=False)
    mesh.visual = trimesh.visual.TextureVisuals(uv=np.array(TETRA_VT, float))
    return mesh


def gltf_files() -> dict[str, bytes]:
    """A valid .gltf with one external buffer, as {file name: bytes}."""
    files = tetra_mesh().export(file_type="gltf")
    return {name: bytes(data) for name, data in files.items()}


def gltf_variant(folder: Path, change) -> Path:
    """Write the valid .gltf into ``folder`` after ``change(document, folder)`` edits its JSON."""
    files = gltf_files()
    name = next(n for n in files if n.endswith(".gltf"))
    doc = json.loads(files.pop(name))
    for other, data in files.items():
        (folder / other).write_bytes(data)
    change(doc, folder)
    (folder / "model.gltf").write_text(json.dumps(doc))
    return folder / "model.gltf"


def glb_bytes() -> bytes:
    return bytes(tetra_mesh().export(file_type="glb"))


def ply_header(vertices: int, faces: int, fmt: str = "binary_little_endian") -> bytes:
    return (f"ply\nformat {fmt} 1.0\nelement vertex {vertices}\nproperty float x\nproperty float y\n"
            f"property float z\nelement face {faces}\nproperty list uchar int vertex_indices\nend_header\n").encode()


def write(path: Path, data) -> Path:
    if isinstance(data, str):
        path.write_text(data)
    else:
        path.write_bytes(data)
    return path


# ---------------------------------------------------------------------------- the cases
# Each maker gets an empty case folder and returns the command line after "thickbake".
# A "mesh" case bakes the file it makes; an "option" case bakes a valid tetrahedron with options.
MESH_CASES = {
    # empty and truncated files
    "empty_obj": lambda d: write(d / "x.obj", b""),
    "empty_glb": lambda d: write(d / "x.glb", b""),
    "empty_gltf": lambda d: write(d / "x.gltf", b""),
    "empty_ply": lambda d: write(d / "x.ply", b""),
    "only_comments_obj": lambda d: write(d / "x.obj", "# nothing here\n# at all\n"),
    # binary garbage named like text formats
    "garbage_obj_with_nul": lambda d: write(d / "x.obj", bytes(range(256)) * 64),
    "garbage_obj_high_bytes": lambda d: write(d / "x.obj", bytes(range(128, 256)) * 64),
    "zeros_ply": lambda d: write(d / "x.ply", bytes(100_000)),
    "zeros_ply_over_cap": lambda d: _sparse(d / "x.ply", 600 * 1024**2),
    # OBJ defects trimesh accepts or mis-reads
    "obj_face_index_0": lambda d: write(d / "x.obj", obj_text(faces=[(0, 3, 2), (1, 2, 4), (1, 4, 3), (2, 3, 4)])),
    "obj_face_index_past_end": lambda d: write(d / "x.obj", obj_text(extra="f 1 2 99999\n")),
    "obj_face_index_30_digits": lambda d: write(d / "x.obj", obj_text(extra="f 1 2 " + "9" * 30 + "\n")),
    "obj_face_negative_too_far": lambda d: write(d / "x.obj", obj_text(extra="f -1 -2 -9\n")),
    "obj_two_index_face": lambda d: write(d / "x.obj", obj_text(extra="f 1 2\n")),
    "obj_face_not_numbers": lambda d: write(d / "x.obj", obj_text(extra="f a b c\n")),
    "obj_short_vertex": lambda d: write(d / "x.obj", "v 1 2\n" + obj_text()),
    "obj_short_uv": lambda d: write(d / "x.obj", "vt 0.5\n" + obj_text()),
    "obj_short_normal": lambda d: write(d / "x.obj", "vn 0 1\n" + obj_text()),
    "obj_nan_vertex": lambda d: write(d / "x.obj", obj_text(vertices=[(0, 0, 0), (float("nan"), 0, 0), (0, 1, 0), (0, 0, 1)])),
    "obj_inf_vertex": lambda d: write(d / "x.obj", obj_text(vertices=[(0, 0, 0), (float("inf"), 0, 0), (0, 1, 0), (0, 0, 1)])),
    "obj_scaled_1e30": lambda d: write(d / "x.obj", obj_text(vertices=[tuple(c * 1e30 for c in v) for v in TETRA_V])),
    "obj_scaled_1e-30": lambda d: write(d / "x.obj", obj_text(vertices=[tuple(c * 1e-30 for c in v) for v in TETRA_V])),
    "obj_far_from_origin": lambda d: write(d / "x.obj", obj_text(vertices=[(x + 1e15, y, z) for x, y, z in TETRA_V])),
    "obj_collinear": lambda d: write(d / "x.obj", obj_text(vertices=[(0, 0, 0), (1, 0, 0), (2, 0, 0), (3, 0, 0)])),
    "obj_single_point": lambda d: write(d / "x.obj", obj_text(vertices=[(1, 1, 1)] * 4)),
    "obj_no_uv": lambda d: write(d / "x.obj", "v 0 0 0\nv 1 0 0\nv 0 1 0\nv 0 0 1\nf 1 3 2\nf 1 2 4\nf 1 4 3\nf 2 3 4\n"),
    "obj_uv_past_end": lambda d: write(d / "x.obj", obj_text(extra="f 1/99 2/99 3/99\n")),
    # GLB container defects
    "glb_wrong_magic": lambda d: write(d / "x.glb", b"gLTF" + glb_bytes()[4:]),
    "glb_version_1": lambda d: write(d / "x.glb", glb_bytes()[:4] + struct.pack("<I", 1) + glb_bytes()[8:]),
    "glb_length_too_big": lambda d: write(d / "x.glb", glb_bytes()[:8] + struct.pack("<I", 1 << 30) + glb_bytes()[12:]),
    "glb_truncated": lambda d: write(d / "x.glb", glb_bytes()[: len(glb_bytes()) // 2]),
    "glb_truncated_fixed_length": lambda d: _glb_cut(d / "x.glb"),
    "glb_json_garbage": lambda d: _glb_json(d / "x.glb", b'{"asset": {"version": "2.0"}, "accessors": [{'),
    "glb_accessor_past_view": lambda d: _glb_edit(d / "x.glb", lambda doc: doc["accessors"][0].update(count=10**6)),
    "glb_view_past_buffer": lambda d: _glb_edit(d / "x.glb", lambda doc: doc["bufferViews"][0].update(byteOffset=10**7)),
    "glb_bad_accessor_ref": lambda d: _glb_edit(d / "x.glb", lambda doc: doc["meshes"][0]["primitives"][0].update(indices=99)),
    "glb_bad_component_type": lambda d: _glb_edit(d / "x.glb", lambda doc: doc["accessors"][0].update(componentType=1)),
    # .gltf JSON and buffer defects
    "gltf_broken_json": lambda d: write(d / "x.gltf", '{"asset": {"version": "2.0"}, "buffers": [}'),
    "gltf_not_an_object": lambda d: write(d / "x.gltf", "[1, 2, 3]"),
    "gltf_deep_nesting": lambda d: write(d / "x.gltf", "[" * 100_000 + "]" * 100_000),
    "gltf_bad_base64": lambda d: gltf_variant(d, lambda doc, f: doc["buffers"][0].update(
        uri="data:application/octet-stream;base64,@@@not base64@@@")),
    "gltf_short_data_uri": lambda d: gltf_variant(d, lambda doc, f: doc["buffers"][0].update(
        uri="data:application/octet-stream;base64," + base64.b64encode(b"abc").decode())),
    "gltf_missing_buffer": lambda d: gltf_variant(d, lambda doc, f: doc["buffers"][0].update(uri="nowhere.bin")),
    "gltf_buffer_too_short": lambda d: gltf_variant(d, lambda doc, f: doc["buffers"][0].update(
        byteLength=doc["buffers"][0]["byteLength"] * 10)),
    "gltf_uri_parent_with_decoy": lambda d: _escaping_gltf(d, "../outside/{name}"),
    "gltf_uri_absolute": lambda d: _escaping_gltf(d, "{folder}/../outside/{name}"),
    "gltf_uri_file_scheme": lambda d: _escaping_gltf(d, "file://{folder}/{name}"),
    "gltf_uri_http": lambda d: _escaping_gltf(d, "http://example.invalid/{name}"),
    "gltf_uri_link_out": lambda d: _linked_buffer(d),
    "gltf_image_outside": lambda d: gltf_variant(d, lambda doc, f: doc.setdefault("images", []).append(
        {"uri": "../../etc/passwd"})),
    # PLY defects
    "ply_huge_counts": lambda d: write(d / "x.ply", ply_header(10**9, 10**9)),
    "ply_truncated": lambda d: write(d / "x.ply", ply_header(4, 4) + bytes(20)),
    "ply_bad_header": lambda d: write(d / "x.ply", b"ply\nformat binary_little_endian 1.0\nelement vertex many\nend_header\n"),
    "ply_ascii_short": lambda d: write(d / "x.ply", ply_header(100, 100, "ascii") + b"0 0 0\n"),
    # things that are not regular files, named like meshes
    "folder_named_obj": lambda d: (d / "x.obj").mkdir() or d / "x.obj",
    "fifo_named_obj": lambda d: os.mkfifo(d / "x.obj") or d / "x.obj",
    "device_link_named_obj": lambda d: os.symlink("/dev/zero", d / "x.obj") or d / "x.obj",
    "socket_named_obj": lambda d: _socket(d / "x.obj"),
    "dangling_link": lambda d: os.symlink(d / "gone.obj", d / "x.obj") or d / "x.obj",
    "newline_in_name": lambda d: write(d / "two\nlines.obj", "garbage\x00"),
    "unsupported_suffix": lambda d: write(d / "x.fbx", obj_text()),
    "no_suffix": lambda d: write(d / "x", obj_text()),
    "missing_file": lambda d: d / "nothing.obj",
}

OPTION_CASES = {
    "size_0": ["--size", "0"],
    "size_negative": ["--size", "-5"],
    "size_text": ["--size", "big"],
    "size_too_large": ["--size", "99999"],
    "size_three_parts": ["--size", "4x4x4"],
    "rays_0": ["--rays", "0"],
    "rays_negative": ["--rays", "-1"],
    "rays_huge": ["--rays", str(10**9)],
    "cone_91": ["--cone", "91"],
    "cone_negative": ["--cone", "-1"],
    "cone_nan": ["--cone", "nan"],
    "seed_negative": ["--seed", "-1"],
    "seed_2_pow_64": ["--seed", str(2**64)],
    "seed_2_pow_70": ["--seed", str(2**70)],
    "reach_1e300": ["--reach", "1e300"],
    "reach_1e-300": ["--reach", "1e-300"],
    "reach_negative": ["--reach", "-1"],
    "reach_nan": ["--reach", "nan"],
    "reach_inf": ["--reach", "inf"],
    "reach_huge_percent": ["--reach", "1e300%"],
    "bias_1e300": ["--bias", "1e300"],
    "bias_1e-300": ["--bias", "1e-300"],
    "bias_negative": ["--bias", "-1"],
    "attenuation_1e300": ["--measure", "transmittance", "--attenuation-distance", "1e300"],
    "attenuation_1e-300": ["--measure", "transmittance", "--attenuation-distance", "1e-300"],
    "attenuation_0": ["--measure", "transmittance", "--attenuation-distance", "0"],
    "supersample_0": ["--supersample", "0"],
    "supersample_100": ["--supersample", "100"],
    "pad_negative": ["--pad", "-1"],
    "pad_text": ["--pad", "wide"],
    "bits_12": ["--bits", "12"],
    "threads_0": ["--threads", "0"],
    "target_error_negative": ["--target-error", "-1"],
    "chunk_rays_1": ["--chunk-rays", "1"],
    "measure_unknown": ["--measure", "weight"],
    "output_jpg": ["-o", "{out}/map.jpg"],
}

#: Rules files (batch SRC -o OUT) whose values are refused before anything is baked.
RULES_CASES = {
    "rules_seed_2_pow_70": f"[defaults]\nseed = {2**70}\n",
    "rules_seed_negative": "[defaults]\nseed = -1\n",
    "rules_rays_bool": "[defaults]\nrays = true\n",
    "rules_size_0": "[defaults]\nsize = 0\n",
    "rules_cone_91": "[defaults]\ncone = 91.0\n",
    "rules_not_toml": "[defaults\nseed = 1\n",
    "rules_binary": "\x00\x01\x02",
}


def _sparse(path: Path, size: int) -> Path:
    with open(path, "wb") as handle:
        handle.truncate(size)  # a sparse file: no disk space used
    return path


def _glb_parts():
    data = glb_bytes()
    json_len = struct.unpack_from("<I", data, 12)[0]
    doc = json.loads(data[20:20 + json_len])
    binary = data[20 + json_len + 8:]
    return doc, binary


def _glb_build(json_blob: bytes, binary: bytes) -> bytes:
    json_blob += b" " * (-len(json_blob) % 4)
    binary += b"\x00" * (-len(binary) % 4)
    total = 12 + 8 + len(json_blob) + 8 + len(binary)
    return (struct.pack("<4sII", b"glTF", 2, total) + struct.pack("<I4s", len(json_blob), b"JSON") + json_blob
            + struct.pack("<I4s", len(binary), b"BIN\x00") + binary)


def _glb_edit(path: Path, change) -> Path:
    doc, binary = _glb_parts()
    change(doc)
    return write(path, _glb_build(json.dumps(doc).encode(), binary))


def _glb_json(path: Path, blob: bytes) -> Path:
    _, binary = _glb_parts()
    return write(path, _glb_build(blob, binary))


def _glb_cut(path: Path) -> Path:
    """A GLB cut short whose header length was fixed up to match (the BIN chunk runs past the end)."""
    data = glb_bytes()
    cut = data[: len(data) - 40]
    return write(path, cut[:8] + struct.pack("<I", len(cut)) + cut[12:])


def _escaping_gltf(folder: Path, pattern: str) -> Path:
    """A .gltf whose buffer URI leaves its folder, with a same-named decoy file in the folder itself:
    the load must fail, never quietly use the decoy."""
    asset = folder / "asset"
    asset.mkdir()
    outside = folder / "outside"
    outside.mkdir()

    def change(doc, f):
        name = doc["buffers"][0]["uri"]
        (outside / name).write_bytes((f / name).read_bytes())  # the real buffer, outside
        doc["buffers"][0]["uri"] = pattern.format(folder=f, name=name)

    return gltf_variant(asset, change)


def _linked_buffer(folder: Path) -> Path:
    asset = folder / "asset"
    asset.mkdir()
    outside = folder / "outside"
    outside.mkdir()

    def change(doc, f):
        name = doc["buffers"][0]["uri"]
        (outside / name).write_bytes((f / name).read_bytes())
        (f / name).unlink()
        os.symlink(outside / name, f / name)

    return gltf_variant(asset, change)


def _socket(path: Path) -> Path:
    sock = socket.socket(socket.AF_UNIX)
    try:
        sock.bind(str(path))
    except OSError as exc:  # a path too long for AF_UNIX
        pytest.skip(f"cannot bind a socket here: {exc}")
    finally:
        sock.close()
    return path


def _run(args, cwd) -> dict:
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    try:
        proc = subprocess.run([sys.executable, "-m", "thickbake", *map(str, args)], capture_output=True, text=True,
                              cwd=cwd, env=env, timeout=TIMEOUT_SECONDS, stdin=subprocess.DEVNULL)
    except subprocess.TimeoutExpired:
        return {"code": None, "stderr": f"timed out after {TIMEOUT_SECONDS} s (a hang)", "stdout": ""}
    return {"code": proc.returncode, "stderr": proc.stderr, "stdout": proc.stdout}


def _prepare(kind: str, name: str, folder: Path) -> tuple[list, Path]:
    out = folder / "out"
    if kind == "mesh":
        mesh = MESH_CASES[name](folder)
        return ["bake", mesh, "-o", out / "map.png", *FAST], out
    if kind == "option":
        mesh = write(folder / "tetra.obj", obj_text())
        options = [a.format(out=out) for a in OPTION_CASES[name]]
        if "-o" not in options:
            options += ["-o", out / "map.png"]
        return ["bake", mesh, *FAST, *options], out
    src = folder / "src"
    src.mkdir()
    write(src / "tetra.obj", obj_text())
    write(src / "thickbake.toml", RULES_CASES[name])
    return ["batch", src, "-o", out], out


ALL_CASES = ([("mesh", n) for n in MESH_CASES] + [("option", n) for n in OPTION_CASES]
             + [("rules", n) for n in RULES_CASES])


@pytest.fixture(scope="module")
def outcomes(tmp_path_factory, request):
    """Run every selected case once, four at a time (each is its own Python process)."""
    selected = {item.callspec.params.get("name") for item in request.session.items
                if getattr(item, "callspec", None) is not None and item.module is request.module}
    prepared = {}
    skipped = {}
    for kind, name in ALL_CASES:
        if name not in selected:
            continue
        folder = tmp_path_factory.mktemp(name)
        try:
            prepared[name] = _prepare(kind, name, folder) + (folder,)
        except pytest.skip.Exception as exc:
            skipped[name] = str(exc)
    with ThreadPoolExecutor(max_workers=4) as pool:
        futures = {name: pool.submit(_run, args, folder) for name, (args, out, folder) in prepared.items()}
        results = {name: dict(future.result(), out=prepared[name][1]) for name, future in futures.items()}
    return results, skipped


def test_at_least_sixty_cases():
    assert len(ALL_CASES) >= 60


@pytest.mark.parametrize("kind, name", ALL_CASES, ids=[n for _, n in ALL_CASES])
def test_refused_in_one_line(outcomes, kind, name):
    results, skipped = outcomes
    if name in skipped:
        pytest.skip(skipped[name])
    result = results[name]
    lines = result["stderr"].splitlines()
    assert result["code"] == 2, result["stderr"]
    assert len(lines) == 1 and lines[0].startswith("thickbake: error:"), result["stderr"]
    assert "Traceback" not in result["stderr"] and "Warning" not in result["stderr"]
    out = result["out"]
    assert not out.exists() or not any(out.rglob("*")), sorted(out.rglob("*"))


# what the one line says, for the classes whose wording matters most
EXPECTED_WORDS = {
    "obj_face_index_0": ["line 17", "vertex 0"],
    "obj_face_index_past_end": ["line 21", "vertex 99999", "only 4"],
    "obj_two_index_face": ["line 21", "at least 3 corners"],
    "obj_short_vertex": ["line 1", "3 numbers"],
    "garbage_obj_with_nul": ["binary data"],
    "zeros_ply_over_cap": ["over the", "limit"],
    "zeros_ply": ["PLY header"],
    "fifo_named_obj": ["FIFO"],
    "device_link_named_obj": ["character device"],
    "folder_named_obj": ["folder"],
    "dangling_link": ["missing file"],
    "gltf_broken_json": ["JSON is broken", "line 1"],
    "gltf_bad_base64": ["buffers[0]", "base64"],
    "glb_view_past_buffer": ["bufferViews[0]", "beyond buffer 0"],
    "glb_accessor_past_view": ["accessors[0]"],
    "gltf_uri_parent_with_decoy": ["outside the asset's folder"],
    "gltf_uri_link_out": ["outside the asset's folder"],
    "gltf_uri_file_scheme": ["not a relative file name"],
    "obj_scaled_1e30": ["scene units across"],
    "obj_scaled_1e-30": ["scene units across"],
    "obj_collinear": ["no surface area"],
    "obj_far_from_origin": ["from the origin"],
    "seed_2_pow_70": ["seed", "18446744073709551615"],
    "reach_1e300": ["reach", "times the bounding-box diagonal"],
    "bias_1e-300": ["bias", "times the bounding-box diagonal"],
    "rules_seed_2_pow_70": ["seed", "18446744073709551615"],
    "newline_in_name": ["two lines.obj"],
}


@pytest.mark.parametrize("name", sorted(EXPECTED_WORDS))
def test_message_names_the_place_and_the_problem(outcomes, name):
    results, skipped = outcomes
    if name in skipped:
        pytest.skip(skipped[name])
    line = results[name]["stderr"]
    for words in EXPECTED_WORDS[name]:
        assert words in line, line


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0,
                    reason="root reads files whatever their permissions; CI runs as root")
def test_unreadable_file(tmp_path):
    mesh = write(tmp_path / "x.obj", obj_text())
    mesh.chmod(0)
    result = _run(["bake", mesh, "-o", tmp_path / "out" / "map.png", *FAST], tmp_path)
    assert result["code"] == 2 and len(result["stderr"].splitlines()) == 1, result["stderr"]
    assert "permission" in result["stderr"].lower()
    assert not (tmp_path / "out").exists()


def test_the_valid_tetrahedron_bakes(tmp_path):
    """The base of the option cases is itself valid, so each option case fails for its option."""
    mesh = write(tmp_path / "tetra.obj", obj_text())
    result = _run(["bake", mesh, "-o", tmp_path / "out" / "map.png", *FAST], tmp_path)
    assert result["code"] == 0, result["stderr"]
    assert (tmp_path / "out" / "map.png").is_file()


def test_valid_gltf_and_glb_variants_bake(tmp_path):
    """The unmodified .gltf and .glb the defect cases start from are accepted."""
    gltf = gltf_variant(tmp_path, lambda doc, f: None)
    glb = write(tmp_path / "x.glb", glb_bytes())
    for mesh in (gltf, glb):
        result = _run(["bake", mesh, "-o", tmp_path / "out" / f"{mesh.suffix[1:]}.png", *FAST], tmp_path)
        assert result["code"] == 0, result["stderr"]
