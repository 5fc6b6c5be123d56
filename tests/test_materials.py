"""Production assets: one map per material, UV set and UDIM tile; ray blockers; precision far from the
origin; start offsets under bent normals; glTF units; escapes against misses.

Tolerances follow tests/test_bake.py's recipe: along −N every ray of a sphere texel has the chord 2R
(elementary geometry), short by at most 2δ (facet bound of the mesh, ``shape.facet_error``) plus the
bias residual (≤ bias) plus float32 rounding (1e-5 scene units on unit-sized shapes) plus, for PNG
codes, half a quantisation step.  Cosine-lobe means are 4R/3 with per-ray variance 2R² − 16R²/9
(chord density ℓ/(2R²) on [0, 2R]); a texel mean of n rays is allowed z·σ/√n with a Bonferroni z
over the texels.
"""

import json
import math
import struct

import numpy as np
import pytest
import trimesh
from scipy.stats import norm

import thickbake
from thickbake.checks import shapes
from thickbake.checks.surfaces import uv_islands
from thickbake.errors import ThickbakeError
from thickbake.pipeline.groups import udim_tile
from thickbake.pipeline.load import load_asset

FLOAT32 = 1e-5


def z_bonferroni(m: int, alpha: float = 1e-3) -> float:
    return float(norm.isf(alpha / (2 * max(m, 1))))


@pytest.fixture(scope="module")
def unit():
    return shapes.sphere(radius=1.0, segments=48)


@pytest.fixture(scope="module")
def small():
    return shapes.sphere(radius=0.4, segments=48)


def _with_material(mesh, name):
    material = trimesh.visual.material.PBRMaterial(name=name, baseColorFactor=[200, 200, 200, 255])
    return trimesh.Trimesh(mesh.vertices, mesh.faces, vertex_normals=mesh.vertex_normals,
                           visual=trimesh.visual.TextureVisuals(uv=mesh.visual.uv, material=material), process=False)


def _scene(*items):
    scene = trimesh.Scene()
    for name, mesh, offset in items:
        scene.add_geometry(mesh, geom_name=name, node_name=name, transform=trimesh.transformations.translation_matrix(offset))
    return scene


# ---------------------------------------------------------------------------------- GLB editing
def glb_parts(data: bytes):
    """(json dict, binary chunk) of a GLB (glTF 2.0 §4.4)."""
    n = struct.unpack_from("<I", data, 12)[0]
    doc = json.loads(data[20:20 + n])
    rest = 20 + n
    size = struct.unpack_from("<I", data, rest)[0]
    return doc, bytearray(data[rest + 8: rest + 8 + size])


def glb_bytes(doc: dict, binary: bytes) -> bytes:
    text = json.dumps(doc).encode()
    text += b" " * (-len(text) % 4)
    binary = bytes(binary) + b"\0" * (-len(binary) % 4)
    doc["buffers"][0]["byteLength"] = len(binary)
    text = json.dumps(doc).encode()
    text += b" " * (-len(text) % 4)
    total = 12 + 8 + len(text) + 8 + len(binary)
    return (struct.pack("<4sII", b"glTF", 2, total) + struct.pack("<II", len(text), 0x4E4F534A) + text
            + struct.pack("<II", len(binary), 0x004E4942) + binary)


def add_accessor(doc: dict, binary: bytearray, array: np.ndarray, kind: str) -> int:
    """Append float32 data as a new bufferView + accessor; returns the accessor index."""
    binary.extend(b"\0" * (-len(binary) % 4))
    data = np.ascontiguousarray(array, dtype="<f4").tobytes()
    doc["bufferViews"].append({"buffer": 0, "byteOffset": len(binary), "byteLength": len(data)})
    binary.extend(data)
    doc["accessors"].append({"bufferView": len(doc["bufferViews"]) - 1, "componentType": 5126,
                             "count": int(len(array)), "type": kind})
    return len(doc["accessors"]) - 1


def read_accessor(doc, binary, index):
    acc = doc["accessors"][index]
    view = doc["bufferViews"][acc["bufferView"]]
    width = {"VEC2": 2, "VEC3": 3}[acc["type"]]
    start = view.get("byteOffset", 0) + acc.get("byteOffset", 0)
    return np.frombuffer(bytes(binary[start:start + 4 * width * acc["count"]]), "<f4").reshape(-1, width)


# ---------------------------------------------------------------------------------- materials
def test_two_materials_two_maps_each_its_own_closed_form(unit, small, tmp_path):
    # two spheres, each with its own material and full-square UVs, in one glTF: two maps; along −N
    # every texel reads its own sphere's 2R (elementary geometry: the normal passes through the centre)
    scene = _scene(("big", _with_material(unit.mesh, "big"), (-3, 0, 0)),
                   ("pea", _with_material(small.mesh, "pea"), (3, 0, 0)))
    path = tmp_path / "pair.glb"
    path.write_bytes(scene.export(file_type="glb"))
    maps = thickbake.bake_maps(str(path), size=64, cone=0)
    assert [(m.key.material, m.key.uv_set, m.key.tile) for m in maps] == [("big", 0, None), ("pea", 0, None)]
    for result, shape in zip(maps, (unit, small)):
        radius = shape.params["radius"]
        tol = 2 * shape.facet_error + result.settings.bias + FLOAT32
        assert np.abs(result.values[result.covered] - 2 * radius).max() <= tol
        assert result.info["overlap"] == 0  # each map holds one sphere: no texel claimed twice
    with pytest.raises(ThickbakeError, match="2 maps"):
        thickbake.bake(str(path), size=16, cone=0)


def test_two_materials_cosine_lobe_means(unit, small):
    # cosine-lobe mean chord of a sphere is 4R/3 (REFERENCES.md, chord 2R·cosθ under pdf cosθ/π),
    # per-ray variance 2R² − 16R²/9
    scene = _scene(("big", _with_material(unit.mesh, "big"), (-3, 0, 0)),
                   ("pea", _with_material(small.mesh, "pea"), (3, 0, 0)))
    rays = 32
    for result, shape in zip(thickbake.bake_maps(scene, size=48, rays=rays), (unit, small)):
        radius = shape.params["radius"]
        values = result.values[result.covered]
        sigma = radius * math.sqrt(2 - 16 / 9)
        tol = z_bonferroni(values.size) * sigma / math.sqrt(rays) + 2 * shape.facet_error + result.settings.bias
        assert np.abs(values - 4 * radius / 3).max() <= tol


def test_gltf_primitive_without_material_keeps_its_uvs(unit, tmp_path):
    # glTF 2.0 §3.7.2.1: a primitive without "material" uses the default material; its TEXCOORD_0
    # still holds the UV layout
    doc, binary = glb_parts(_scene(("ball", unit.mesh, (0, 0, 0))).export(file_type="glb"))
    for prim in doc["meshes"][0]["primitives"]:
        prim.pop("material", None)
    doc.pop("materials", None)
    path = tmp_path / "bare.glb"
    path.write_bytes(glb_bytes(doc, binary))
    result = thickbake.bake(str(path), size=48, cone=0)
    assert result.key.material is None and result.info["map_of"] == {"material": None, "uv_set": 0, "tile": None}
    assert np.abs(result.values[result.covered] - 2.0).max() <= 2 * unit.facet_error + result.settings.bias + FLOAT32


def test_second_uv_set(unit, tmp_path):
    # TEXCOORD_1 holds the same islands at half size in the upper-left quarter of the image (glTF UV
    # (0, 0) is the image's upper-left corner, glTF 2.0 §3.8.4.1): --uv-set 1 bakes that layout
    doc, binary = glb_parts(_scene(("ball", unit.mesh, (0, 0, 0))).export(file_type="glb"))
    prim = doc["meshes"][0]["primitives"][0]
    uv0 = read_accessor(doc, binary, prim["attributes"]["TEXCOORD_0"]).astype(np.float64)
    prim["attributes"]["TEXCOORD_1"] = add_accessor(doc, binary, 0.5 * uv0, "VEC2")
    path = tmp_path / "two_sets.glb"
    path.write_bytes(glb_bytes(doc, binary))
    first = thickbake.bake(str(path), size=64, cone=0)
    second = thickbake.bake(str(path), size=64, cone=0, uv_set=1)
    assert second.key.uv_set == 1 and second.info["map_of"]["uv_set"] == 1
    rows, cols = np.nonzero(second.covered)
    assert rows.max() < 33 and cols.max() < 33  # the quarter, plus a border texel
    assert first.covered[40:, :].any()
    tol = 2 * unit.facet_error + second.settings.bias + FLOAT32
    assert np.abs(second.values[second.covered] - 2.0).max() <= tol
    with pytest.raises(ThickbakeError, match="no UV set 2"):
        thickbake.bake(str(path), size=16, cone=0, uv_set=2)


def test_udim_tiles_each_get_a_correct_map(unit):
    # islands whose UV centroid lies right of u = 0.5 move one tile to the right: tile 1002 (UDIM:
    # 1001 + ⌊u⌋ + 10·⌊v⌋, MaterialX Specification v1.39); both maps read 2R along −N
    mesh = unit.mesh.copy()
    uv = np.asarray(mesh.visual.uv, dtype=np.float64).copy()
    island = uv_islands(mesh)
    face_u = uv[mesh.faces].mean(axis=1)[:, 0]
    right = np.bincount(island, weights=face_u) / np.bincount(island) > 0.5
    moved = np.zeros(len(uv), bool)
    moved[mesh.faces[right[island]].ravel()] = True
    uv[moved, 0] += 1.0
    mesh.visual = trimesh.visual.TextureVisuals(uv=uv, material=mesh.visual.material)
    whole = thickbake.bake(unit.mesh, size=64, cone=0)
    maps = thickbake.bake_maps(mesh, size=64, cone=0)
    assert [m.key.tile for m in maps] == [1001, 1002]
    assert int(udim_tile(np.array([1]), np.array([1]))[0]) == 1012  # the tile above 1002
    for result in maps:
        tol = 2 * unit.facet_error + result.settings.bias + FLOAT32
        assert np.abs(result.values[result.covered] - 2.0).max() <= tol
    # shifting an island by a whole tile leaves its texels where they were
    union = maps[0].covered | maps[1].covered
    assert not (maps[0].covered & maps[1].covered).any()
    assert (union == whole.covered).mean() > 0.999


# ---------------------------------------------------------------------------------- blockers
def test_blockers_own_versus_all(unit):
    # a small sphere (R = 0.3) sunk half into a unit sphere: with every part blocking, the big sphere's
    # inward normal rays that pass through the small one stop at its surface; with "own" each part
    # sees only itself and every texel reads its own 2R again
    pea = shapes.sphere(radius=0.3, segments=48)
    scene = _scene(("body", _with_material(unit.mesh, "body"), (0, 0, 0)),
                   ("bead", _with_material(pea.mesh, "bead"), (1, 0, 0)))
    own = thickbake.bake_maps(scene, size=64, cone=0, blockers="own")
    for result, shape in zip(own, (unit, pea)):
        radius = shape.params["radius"]
        assert result.info["blockers"] == "own"
        assert np.abs(result.values[result.covered] - 2 * radius).max() <= 2 * shape.facet_error + result.settings.bias + FLOAT32
    body = thickbake.bake_maps(scene, size=64, cone=0)[0]
    assert body.info["blockers"] == "all"
    # the texel at (−1, 0, 0) looks along +x and meets the bead at x = 0.7: chord 1.7, not 2
    assert body.values[body.covered].min() <= 1.7 + 2 * unit.facet_error + 0.05
    # naming the bead as blocker for everything gives the default's answer for the body
    named = thickbake.bake_maps(scene, size=64, cone=0, blockers="bead")[0]
    np.testing.assert_allclose(named.values, body.values, atol=1e-6)
    with pytest.raises(ThickbakeError, match="neither a part nor a material"):
        thickbake.bake_maps(scene, size=16, cone=0, blockers="wheel")


# ---------------------------------------------------------------------------------- precision
@pytest.mark.parametrize("diagonals", [1e4, 1e6])
def test_far_from_origin_every_texel_exact(unit, diagonals):
    # the same closed form 2R anywhere: positions are re-centred in float64 before the float32 cast
    mesh = unit.mesh.copy()
    diag = float(np.linalg.norm(mesh.extents))
    mesh.vertices = np.asarray(mesh.vertices, dtype=np.float64) + diagonals * diag / math.sqrt(3) * np.ones(3)
    result = thickbake.bake(mesh, size=64, cone=0)
    # float64 input rounding at 10⁶ diagonals is ~1e-9, far inside the float32 term
    tol = 2 * unit.facet_error + result.settings.bias + FLOAT32
    assert np.abs(result.values[result.covered] - 2.0).max() <= tol
    assert result.info["escape_fraction"] == 0


def test_unrepresentable_coordinates_refused(unit):
    far = unit.mesh.copy()
    far.vertices = np.asarray(far.vertices) + 1e12
    with pytest.raises(ThickbakeError, match="lost its shape to rounding"):
        load_asset(far)
    tiny = unit.mesh.copy()
    tiny.vertices = np.asarray(tiny.vertices) * 1e-18
    with pytest.raises(ThickbakeError, match="below float32 resolution"):
        load_asset(tiny)


def test_bent_file_normals_match_the_bias_to_zero_limit():
    # A slab whose file normals are bent up to ~72° towards its corners.  A bake with the default
    # offset must agree with a bake whose offset is 100x smaller (the bias → 0 limit).  Along a face
    # of a box a ray's chord changes by at most the offset b (exact through the parallel wall; a
    # perpendicular wall is parallel to the offset, leaving only the first-order correction ≤ b).
    # Two effects add a few b on some texels: a ray passing within b of a far edge can leave through
    # a different wall from the two starts, and samples within 4 biases of a triangle edge are placed
    # by an amount that scales with the bias (texels.keep_off_edges), near the edges' log-singular
    # chord field.  So: texels beyond 3(b + b_ref) + float32 must stay under 1% (a judgement; measured
    # 0.2% here, where an offset along the shading normal put 20% of the texels beyond it, up to 110 b),
    # and the map means agree within b + b_ref.
    box = shapes.box(size=(1.0, 1.0, 0.3))
    m = box.mesh
    towards_corner = m.vertices / np.linalg.norm(m.vertices, axis=1, keepdims=True)
    bent = 0.1 * np.asarray(m.vertex_normals) + 0.9 * towards_corner
    bent /= np.linalg.norm(bent, axis=1, keepdims=True)
    mesh = trimesh.Trimesh(m.vertices, m.faces, vertex_normals=bent, visual=m.visual, process=False)
    diag = float(np.linalg.norm(m.extents))
    a = thickbake.bake(mesh, size=64, rays=64, seed=3)
    ref = thickbake.bake(mesh, size=64, rays=64, seed=3, bias=a.settings.bias / 100)
    inner = a.covered & ref.covered & (a.area > 0)
    diff = np.abs(a.values - ref.values)[inner]
    offsets = a.settings.bias + ref.settings.bias
    assert (diff > 3 * offsets + FLOAT32 * diag).mean() < 0.01
    assert abs(a.values[inner].mean() - ref.values[inner].mean()) <= offsets + FLOAT32 * diag


# ---------------------------------------------------------------------------------- glTF units
def test_node_scale_gives_the_local_unit_factor(unit, tmp_path):
    # KHR_materials_volume: thickness is in the mesh's own coordinate space; under a node scale of
    # 0.01 the world map's factor must be divided by 0.01 so that code / code_max × thicknessFactor
    # = local thickness (here 2R = 2 local units along −N)
    doc, binary = glb_parts(_scene(("ball", unit.mesh, (0, 0, 0))).export(file_type="glb"))
    for node in doc["nodes"]:
        if "mesh" in node:
            node.pop("matrix", None)
            node["scale"] = [0.01, 0.01, 0.01]
    path = tmp_path / "centimetres.glb"
    path.write_bytes(glb_bytes(doc, binary))
    result = thickbake.bake(str(path), size=48, cone=0)
    out = tmp_path / "c.png"
    result.write(out)
    side = json.loads(out.with_suffix(".json").read_text())
    hint = side["gltf_hint"]
    assert hint["node_scales"] == [0.01]
    assert hint["thicknessFactor"] == pytest.approx(result.settings.reach / 0.01, rel=1e-9)
    from thickbake.maps.files import read_image

    codes = read_image(out).astype(np.float64)
    local = codes[result.covered] / side["encoding"]["code_max"] * hint["thicknessFactor"]
    # world tolerance / 0.01 plus half a code step in local units
    tol = (2 * 0.01 * unit.facet_error + result.settings.bias + 1e-7) / 0.01 + 0.5 * hint["thicknessFactor"] / 65535
    assert np.abs(local - 2.0).max() <= tol


def test_instances_with_different_scales_get_no_factor(unit):
    scene = trimesh.Scene()
    scene.add_geometry(unit.mesh, geom_name="ball", node_name="a")
    scene.add_geometry(unit.mesh, geom_name="ball", node_name="b",
                       transform=np.diag([2.0, 2.0, 2.0, 1.0]) @ trimesh.transformations.translation_matrix((5, 0, 0)))
    results = thickbake.bake_maps(scene, size=32, cone=0)
    assert len(results) == 1
    assert results[0].local_thickness_factor is None
    side = results[0].sidecar("x.png")
    assert side["gltf_hint"]["thicknessFactor"] is None and "different scales" in side["gltf_hint"]["why_no_factor"]


# ---------------------------------------------------------------------------------- escapes
def test_occlusion_of_a_closed_sphere_has_no_escapes(unit):
    # on a closed mesh every inward ray meets the wall within the diagonal: nothing escapes, although
    # most rays travel past the occlusion reach (a quarter of the diagonal)
    result = thickbake.bake(unit.mesh, size=48, rays=32, measure="occlusion")
    assert result.info["escape_fraction"] == 0
    assert result.info["miss_fraction"] > 0.3
    assert result.info["warnings"] == []


def test_open_sheet_escapes_and_warns():
    sheet = trimesh.Trimesh(vertices=[[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0]], faces=[[0, 1, 2], [0, 2, 3]],
                            visual=trimesh.visual.TextureVisuals(uv=[[0, 0], [1, 0], [1, 1], [0, 1]]), process=False)
    result = thickbake.bake(sheet, size=16, rays=8)
    assert result.info["escape_fraction"] == 1.0
    assert any("left the mesh" in w for w in result.info["warnings"])


# ---------------------------------------------------------------------------------- honest warnings
def test_faces_without_uv_and_degenerate_triangles_are_named(tmp_path):
    # an OBJ tetrahedron whose last face has no vt, plus a zero-area sliver on its first edge
    path = tmp_path / "tet.obj"
    path.write_text("o tet\nv 0 0 0\nv 1 0 0\nv 0 1 0\nv 0 0 1\nv 0.5 0 0\nvt 0 0\nvt 1 0\nvt 0 1\nvt 1 1\n"
                    "f 1/1 3/3 2/2\nf 1/1 2/2 4/4\nf 1/1 4/4 3/3\nf 2 3 4\nf 1/1 5/2 2/3\n")
    asset = load_asset(str(path))
    text = " ".join(asset.report.warnings)
    assert asset.report.faces_without_uv == 1 and "1 faces have no UV coordinates (in tet)" in text
    assert asset.report.degenerate_faces == 1 and "degenerate" in text
    # the sliver lies along a closed edge: the solid stays closed and consistently wound
    assert asset.report.watertight and asset.report.winding_consistent
    assert "not closed" not in text and "wound opposite" not in text


def test_obj_objects_and_usemtl_make_parts_and_maps(unit, small, tmp_path):
    # OBJ: "o" names a part, "usemtl" a material (Wavefront OBJ format); two spheres in one file, each
    # its own object and material, bake into two maps reading their own 2R along −N, and "--blockers
    # NAME" accepts the object names
    from thickbake.checks.surfaces import obj_bytes

    lines, offset = [], {"v": 0, "vt": 0, "vn": 0}
    for name, shape, dx in (("big", unit, -3.0), ("pea", small, 3.0)):
        text = obj_bytes(shape.mesh).decode()
        counts = {"v": 0, "vt": 0, "vn": 0}
        lines += [f"o {name}", f"usemtl {name}_mat"]
        for line in text.splitlines():
            head, *rest = line.split()
            if head == "v":
                x, y, z = map(float, rest)
                lines.append(f"v {x + dx!r} {y!r} {z!r}")
            elif head in ("vt", "vn"):
                lines.append(line)
            elif head == "f":
                lines.append("f " + " ".join("/".join(str(int(i) + offset[k]) for i, k in zip(c.split("/"), ("v", "vt", "vn")))
                                              for c in rest))
            if head in counts:
                counts[head] += 1
        for k in offset:
            offset[k] += counts[k]
    path = tmp_path / "pair.obj"
    path.write_text("\n".join(lines) + "\n")
    maps = thickbake.bake_maps(str(path), size=48, cone=0, blockers="big,pea")
    assert [m.key.material for m in maps] == ["big_mat", "pea_mat"]
    for result, shape in zip(maps, (unit, small)):
        tol = 2 * shape.facet_error + result.settings.bias + FLOAT32
        assert np.abs(result.values[result.covered] - 2 * shape.params["radius"]).max() <= tol
    assert load_asset(str(path)).parts == ["big", "pea"]


_OBJ_BODY = b"""# a quad and three triangles over four corners (Wavefront OBJ: v, vt, vn, f, o, g, usemtl)
mtllib unused.mtl
v 0 0 0
v 1 0 0
v 1 1 0
v 0 1 0
vt 0 0
vt 1 0
vt 1 1
vt 0 1
vn 0 0 1
f 1/1/1 2/2/1 3/3/1 4/4/1
o box
usemtl red
f 1/1/1 2/2/1 3/3/1
g side  two
usemtl blue
usemtl red
f 1/1/1 3/3/1 4/4/1
o other
g
s off
f 2/2/1 3/3/1 4/4/1 1/1/1 2/2/1
"""


@pytest.mark.parametrize("variant, bulk", [
    ("as written", True),
    ("CRLF line ends", True),
    ("tabs between tokens", True),
    ("v//n corners", True),
    ("v corners only", True),
    ("no faces", True),
    ("relative indices", False),
    ("trailing comment", False),
    ("leading white space", False),
    ("one-number vt", False),
    ("mixed corner forms", False),
    ("mixed forms, same slash total", False),
    ("line continuation", False),
])
def test_obj_bulk_parser_matches_the_line_parser(variant, bulk):
    # The whole-array OBJ parser must give exactly the line-by-line parser's tables (the Wavefront OBJ
    # statements v, vt, vn, f with polygons fanned, o/g parts, usemtl materials), and must hand every
    # form it does not handle to the line parser instead of guessing.
    from thickbake.pipeline import readers

    body = _OBJ_BODY
    body = {
        "CRLF line ends": lambda b: b.replace(b"\n", b"\r\n"),
        "tabs between tokens": lambda b: b.replace(b"v 1 1 0", b"v\t1 1\t0"),
        "v//n corners": lambda b: b.replace(b"/1/1", b"//1").replace(b"/2/1", b"//1").replace(b"/3/1", b"//1")
                                   .replace(b"/4/1", b"//1"),
        "v corners only": lambda b: b.replace(b"/1/1", b"").replace(b"/2/1", b"").replace(b"/3/1", b"")
                                     .replace(b"/4/1", b""),
        "no faces": lambda b: b"\n".join(line for line in b.split(b"\n") if not line.startswith(b"f ")),
        "relative indices": lambda b: b.replace(b"f 1/1/1 2/2/1 3/3/1\n", b"f -4/1/1 2/2/1 3/3/1\n"),
        "trailing comment": lambda b: b.replace(b"v 1 1 0", b"v 1 1 0 # corner"),
        "leading white space": lambda b: b.replace(b"v 1 1 0", b"  v 1 1 0"),
        "one-number vt": lambda b: b.replace(b"vt 1 1", b"vt 1"),
        "mixed corner forms": lambda b: b.replace(b"f 1/1/1 3/3/1 4/4/1", b"f 1//1 3//1 4//1"),
        # three slashes, three and none: the file's slash total still fits "v/t/n", so each corner
        # must be checked alone (the line parser reads v 1, 3, 4 and takes "4" as having no vt/vn)
        "mixed forms, same slash total": lambda b: b.replace(b"f 1/1/1 3/3/1 4/4/1", b"f 1/1/1/1 3/3/1/1 4"),
        "line continuation": lambda b: b.replace(b"v 1 1 0", b"v 1 \\\n1 0"),
    }.get(variant, lambda b: b)(body)
    fast = readers._parse_obj_bulk(body, "asset")
    assert (fast is not None) == bulk
    try:
        slow = readers._parse_obj_lines(body.decode(), "asset.obj")
    except ThickbakeError as exc:  # the line parser refuses it (continuations are not read): so must read_obj
        assert not bulk
        with pytest.raises(ThickbakeError, match="line 5"):
            readers.read_obj("asset.obj", body)
        assert "line 5" in str(exc)
        return
    if bulk:
        for a, b in zip(fast[:4], slow[:4]):
            assert a.dtype == b.dtype and np.array_equal(a, b)
        assert fast[4:] == slow[4:]
    else:  # read_obj falls back to the line parser
        result = readers.read_obj("asset.obj", body)
        assert sum(len(p.triangles) for p in result.parts) == len(slow[3])


def test_degenerate_triangles_bake_and_verify_agree():
    # a closed capsule-like solid with 200 zero-area slivers along its edges: neither bake nor verify may
    # call it open or inward-wound; both name the degenerate triangles
    from thickbake.checks.verify import verify_asset

    cyl = shapes.capped_cylinder(segments=48)
    m = cyl.mesh
    faces = np.asarray(m.faces)
    a, b = faces[:200, 0], faces[:200, 1]
    slivers = np.stack([a, b, a], axis=1)  # a repeated corner: zero area, on an existing edge
    mesh = trimesh.Trimesh(m.vertices, np.vstack([faces, slivers]), vertex_normals=m.vertex_normals, visual=m.visual,
                           process=False)
    asset = load_asset(mesh)
    text = " ".join(asset.report.warnings)
    assert "200 degenerate" in text and "not closed" not in text and "wound opposite" not in text
    report = verify_asset(mesh, {"size": 64, "rays": 8})
    rows = {c.quantity: c for c in report.checks}
    assert rows["closed surface"].status == "PASS" and rows["faces wound outward"].status == "PASS"
    assert "degenerate" in rows["UV coverage"].note
