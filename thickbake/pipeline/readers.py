"""File readers that keep what a per-material bake needs: parts, materials, every UV set, node scales.

trimesh reads meshes well, but for glTF it keeps only ``TEXCOORD_0``, drops the UVs of a primitive
that has no ``material``, and merges the node and primitive structure a ray-blocker choice needs; for
OBJ it regroups faces by material and loses ``o``/``g`` names and faces without ``vt``.  The two
formats are simple enough to read directly:

* :func:`read_gltf` — glTF 2.0 (``.gltf`` with external or ``data:`` buffers, ``.glb``): the default
  scene's node tree (``matrix`` or TRS, §5.25 of the glTF 2.0 specification), every triangle
  primitive (modes 4, 5, 6; points and lines are skipped), its ``material``, ``NORMAL`` and every
  ``TEXCOORD_n``, accessors with byte strides, normalised integer components (§3.11) and sparse
  substitution.  glTF's V is flipped to the OBJ convention (v up), as trimesh does.
* :func:`read_obj` — Wavefront OBJ: ``v``/``vt``/``vn``/``f`` with negative (relative) indices,
  polygons fanned into triangles, ``o`` and ``g`` names (a part), ``usemtl`` (a material).  A face
  without ``vt`` keeps NaN UVs, so the bake can count and name it.  Files in the usual exported form
  are parsed with whole-array passes (numpy's C text reader), about twice as fast as line by line;
  other forms go through the line parser, which gives the same tables.

Both return :class:`Part` lists in world space; everything else goes through trimesh.
"""

from __future__ import annotations

import base64
import io
import json
import struct
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from thickbake.constants import UNIFORM_SCALE_TOLERANCE
from thickbake.errors import ThickbakeError
from thickbake.geometry import expand_ranges
from thickbake.inputs import confined_path, read_regular_file


@dataclass
class Part:
    """One piece of an asset in world space: a glTF primitive under one node, an OBJ object/group,
    or one geometry of a trimesh scene.

    Attributes
    ----------
    name : str
        Label used in messages and the sidecar (``node/mesh`` for glTF, the ``o``/``g`` name for OBJ).
    aliases : tuple of str
        Every name a ``blockers`` list may use for this part (node, mesh, part name).
    triangles : (f, 3, 3) float64
        World positions of each triangle's corners, scene units.
    uv_sets : list of (f, 3, 2) float64
        Corner UVs of each UV set (v up); NaN rows for faces that have none in that set.
    normals : (f, 3, 3) float64 or None
        Corner normals in world space (not normalised), None when the file has none.
    material : int
        Index into the reader's material list.
    scale : float
        Uniform local-to-world scale of the node (NaN when the transform scales unevenly).
    mesh : str
        Identity of the mesh the part instances (two nodes showing one mesh share it).
    """

    name: str
    aliases: tuple
    triangles: np.ndarray
    uv_sets: list
    normals: np.ndarray | None
    material: int
    scale: float = 1.0
    mesh: str = ""
    vertices: int = 0


@dataclass
class Material:
    """A material slot: its name (None when unnamed) and its index in the file (None: no material)."""

    name: str | None
    index: int | None

    @property
    def key(self):
        """What a map is labelled with: the name, else the index, else None (faces without material)."""
        return self.name if self.name else self.index


@dataclass
class ReadResult:
    parts: list[Part]
    materials: list[Material]
    warnings: list[str] = field(default_factory=list)


def transform_scale(linear: np.ndarray) -> float:
    """Uniform scale of a 3×3 linear map (mean singular value), NaN when it scales unevenly."""
    sv = np.linalg.svd(linear, compute_uv=False)
    if not (sv[-1] > 0):
        return float("nan")
    if sv[0] / sv[-1] - 1.0 > UNIFORM_SCALE_TOLERANCE:
        return float("nan")
    return float(sv.mean())


def apply_transform(triangles: np.ndarray, normals: np.ndarray | None, matrix: np.ndarray):
    """World corners, normals (inverse transpose) and winding of a part under a 4×4 transform.

    A negative determinant mirrors the triangles; their corners are reversed (with the UVs and
    normals, by the caller's ``order``) to keep them outward-facing (glTF 2.0 §3.7.4).

    Returns
    -------
    triangles : (f, 3, 3) float64
    normals : (f, 3, 3) float64 or None
    order : list of int
        Corner order to apply to every per-corner array ([0, 1, 2] or [2, 1, 0]).
    """
    linear = matrix[:3, :3]
    world = triangles @ linear.T + matrix[:3, 3]
    if normals is not None:
        normals = normals @ np.linalg.inv(linear)
    order = [2, 1, 0] if np.linalg.det(linear) < 0 else [0, 1, 2]
    return world, normals, order


# ---------------------------------------------------------------------------------------------- glTF
_COMPONENT = {5120: np.int8, 5121: np.uint8, 5122: np.int16, 5123: np.uint16, 5125: np.uint32, 5126: np.float32}
_WIDTH = {"SCALAR": 1, "VEC2": 2, "VEC3": 3, "VEC4": 4, "MAT2": 4, "MAT3": 9, "MAT4": 16}
#: Extensions that replace the accessor data with a compressed stream this reader cannot decode.
_COMPRESSED = ("KHR_draco_mesh_compression", "EXT_meshopt_compression")


def _glb_chunks(data: bytes, where: str):
    if len(data) < 20:
        raise ThickbakeError("cannot read the file (truncated GLB header)", path=where, fix="re-export it")
    magic, version, length = struct.unpack_from("<4sII", data, 0)
    if magic != b"glTF" or version != 2:
        raise ThickbakeError(f"cannot read the file (not a glTF 2.0 binary: version {version})", path=where,
                             fix="export as glTF 2.0 (.glb or .gltf)")
    offset, doc, binary = 12, None, None
    end = min(length, len(data))
    while offset + 8 <= end:
        size, kind = struct.unpack_from("<II", data, offset)
        chunk = data[offset + 8: offset + 8 + size]
        if len(chunk) != size:
            raise ThickbakeError("cannot read the file (truncated GLB chunk)", path=where, fix="re-export it")
        if kind == 0x4E4F534A and doc is None:
            doc = chunk
        elif kind == 0x004E4942 and binary is None:
            binary = chunk
        offset += 8 + size + (-size % 4)
    if doc is None:
        raise ThickbakeError("cannot read the file (GLB without a JSON chunk)", path=where, fix="re-export it")
    return doc, binary


def read_gltf(path: str, data: bytes | None = None) -> ReadResult:
    """Read a ``.gltf``/``.glb`` file into world-space parts (see the module docstring).

    ``data`` is the file's bytes when the caller has read them already.  External buffers are read
    only from inside the file's folder (:func:`thickbake.inputs.confined_path`).
    """
    where = path
    raw = data if data is not None else read_regular_file(path)
    binary = None
    try:
        if raw[:4] == b"glTF":
            doc, binary = _glb_chunks(raw, where)
            gltf = json.loads(doc.decode("utf-8"))
        else:
            gltf = json.loads(raw.decode("utf-8-sig"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise ThickbakeError(f"cannot read the file (invalid glTF JSON: {' '.join(str(exc).split())[:120]})",
                             path=where, fix="re-export it from your modelling tool") from None
    if not isinstance(gltf, dict):
        raise ThickbakeError("cannot read the file (the glTF JSON is not an object)", path=where, fix="re-export it")
    try:
        return _GltfReader(gltf, binary, Path(path).parent, where).read()
    except ThickbakeError:
        raise
    except (KeyError, IndexError, TypeError, ValueError) as exc:
        detail = " ".join(str(exc).split())[:120] or type(exc).__name__
        raise ThickbakeError(f"cannot read the file (malformed glTF: {type(exc).__name__} {detail})", path=where,
                             fix="check it with the Khronos glTF-Validator and re-export it") from None


class _GltfReader:
    def __init__(self, gltf: dict, binary: bytes | None, folder: Path, where: str):
        self.gltf, self.binary, self.folder, self.where = gltf, binary, folder, where
        self._buffers: dict[int, bytes] = {}
        version = str(gltf.get("asset", {}).get("version", "2.0"))
        if not version.startswith("2"):
            raise ThickbakeError(f"cannot read the file (glTF version {version}, not 2.x)", path=where,
                                 fix="export as glTF 2.0")
        required = [e for e in gltf.get("extensionsRequired", []) if e in _COMPRESSED]
        if required:
            raise ThickbakeError(f"the file uses {required[0]} (compressed geometry), which thickbake cannot decode",
                                 path=where, fix="export without mesh compression")

    # -- buffers and accessors
    def buffer(self, index: int) -> bytes:
        if index not in self._buffers:
            spec = self.gltf["buffers"][index]
            uri = spec.get("uri")
            if uri is None:
                if self.binary is None:
                    raise ThickbakeError("cannot read the file (a buffer has no data)", path=self.where, fix="re-export it")
                data = self.binary
            elif uri.startswith("data:"):
                data = base64.b64decode(uri.split(",", 1)[1])
            else:
                # only a regular file inside the asset's folder: never '..', an absolute path or a link out
                target = confined_path(self.folder, uri, self.where)
                data = read_regular_file(target, what=f"buffer {uri!r} of the asset")
            if len(data) < int(spec.get("byteLength", 0)):
                raise ThickbakeError(f"cannot read the file (buffer {index} is shorter than declared)",
                                     path=self.where, fix="re-export it")
            self._buffers[index] = data
        return self._buffers[index]

    def _view(self, view_index: int, offset: int, dtype, width: int, count: int) -> np.ndarray:
        view = self.gltf["bufferViews"][view_index]
        data = self.buffer(view["buffer"])
        start = int(view.get("byteOffset", 0)) + int(offset)
        item = np.dtype(dtype).itemsize * width
        stride = int(view.get("byteStride", 0)) or item
        if count == 0:
            return np.zeros((0, width), dtype)
        need = start + stride * (count - 1) + item
        if need > len(data) or need > int(view.get("byteOffset", 0)) + int(view["byteLength"]):
            raise ThickbakeError("cannot read the file (an accessor runs past its buffer)", path=self.where,
                                 fix="re-export it")
        return _strided(data, start, stride, dtype, width, count)

    def accessor(self, index: int) -> np.ndarray:
        """(count, width) float64 (or integer for indices) values of an accessor."""
        acc = self.gltf["accessors"][index]
        dtype = _COMPONENT[int(acc["componentType"])]
        width = _WIDTH[acc["type"]]
        count = int(acc["count"])
        if "bufferView" in acc:
            values = self._view(int(acc["bufferView"]), int(acc.get("byteOffset", 0)), dtype, width, count)
        else:
            values = np.zeros((count, width), dtype)
        sparse = acc.get("sparse")
        if sparse:
            values = values.copy()
            n = int(sparse["count"])
            idx_spec, val_spec = sparse["indices"], sparse["values"]
            where = self._view(int(idx_spec["bufferView"]), int(idx_spec.get("byteOffset", 0)),
                               _COMPONENT[int(idx_spec["componentType"])], 1, n)[:, 0].astype(np.int64)
            values[where] = self._view(int(val_spec["bufferView"]), int(val_spec.get("byteOffset", 0)), dtype, width, n)
        if acc.get("normalized") and dtype != np.float32:
            # glTF 2.0 §3.11: signed c → max(c / (2^(b-1) − 1), −1), unsigned c → c / (2^b − 1)
            info = np.iinfo(dtype)
            values = np.maximum(values.astype(np.float64) / info.max, -1.0)
        return values

    # -- scene graph
    def read(self) -> ReadResult:
        g = self.gltf
        mats = [Material(m.get("name") or None, i) for i, m in enumerate(g.get("materials", []))]
        default = Material(None, None)
        materials = mats + [default]
        nodes = g.get("nodes", [])
        scenes = g.get("scenes", [])
        if scenes:
            roots = scenes[int(g.get("scene", 0))].get("nodes", [])
        else:
            children = {c for n in nodes for c in n.get("children", [])}
            roots = [i for i in range(len(nodes)) if i not in children]
        parts: list[Part] = []
        warnings: list[str] = []
        stack = [(int(r), np.eye(4)) for r in reversed(roots)]
        seen = 0
        while stack:
            index, parent = stack.pop()
            seen += 1
            if seen > 10 * len(nodes) + 10:
                raise ThickbakeError("cannot read the file (its node tree has a cycle)", path=self.where,
                                     fix="re-export it")
            node = nodes[index]
            world = parent @ _node_matrix(node)
            if "mesh" in node:
                parts.extend(self._mesh_parts(node, index, int(node["mesh"]), world, len(mats), warnings))
            for child in reversed(node.get("children", [])):
                stack.append((int(child), world))
        return ReadResult(parts=parts, materials=materials, warnings=warnings)

    def _mesh_parts(self, node: dict, node_index: int, mesh_index: int, world: np.ndarray, default_material: int,
                    warnings: list[str]):
        mesh = self.gltf["meshes"][mesh_index]
        mesh_name = mesh.get("name") or f"mesh{mesh_index}"
        node_name = node.get("name") or f"node{node_index}"
        prims = mesh.get("primitives", [])
        for k, prim in enumerate(prims):
            mode = int(prim.get("mode", 4))
            if mode not in (4, 5, 6):
                continue  # points and lines carry no surface
            attrs = prim.get("attributes", {})
            if "POSITION" not in attrs:
                continue
            if any(e in prim.get("extensions", {}) for e in _COMPRESSED):
                raise ThickbakeError("the file uses compressed geometry, which thickbake cannot decode",
                                     path=self.where, fix="export without mesh compression")
            positions = self.accessor(int(attrs["POSITION"])).astype(np.float64)
            if "indices" in prim:
                indices = self.accessor(int(prim["indices"]))[:, 0].astype(np.int64)
            else:
                indices = np.arange(len(positions), dtype=np.int64)
            faces = _triangles_of(indices, mode)
            if len(faces) and (faces.min() < 0 or faces.max() >= len(positions)):
                raise ThickbakeError(f"a triangle refers to vertex {int(faces.max())} of {len(positions)} "
                                     "(corrupt index data)", path=self.where,
                                     fix="re-export the mesh from your modelling tool")
            uv_sets = []
            n_sets = 1 + max([int(a.split("_")[1]) for a in attrs if a.startswith("TEXCOORD_")
                              and a.split("_")[1].isdigit()] or [-1])
            for s in range(n_sets):
                key = f"TEXCOORD_{s}"
                if key in attrs:
                    uv = self.accessor(int(attrs[key]))[:, :2].astype(np.float64)
                    uv = np.column_stack([uv[:, 0], 1.0 - uv[:, 1]])  # glTF v down → v up
                    uv_sets.append(uv[faces] if len(uv) == len(positions) else np.full((len(faces), 3, 2), np.nan))
                else:
                    uv_sets.append(np.full((len(faces), 3, 2), np.nan))
            normals = None
            if "NORMAL" in attrs:
                n = self.accessor(int(attrs["NORMAL"]))[:, :3].astype(np.float64)
                if len(n) == len(positions):
                    normals = n[faces]
            tri, normals, order = apply_transform(positions[faces], normals, world)
            tri = tri[:, order]
            uv_sets = [uv[:, order] for uv in uv_sets]
            if normals is not None:
                normals = normals[:, order]
            part_name = f"{node_name}/{mesh_name}" + (f"#{k}" if len(prims) > 1 else "")
            aliases = (part_name, node_name, mesh_name, f"{mesh_name}#{k}")
            material = int(prim["material"]) if "material" in prim else default_material
            yield Part(name=part_name, aliases=aliases, triangles=tri, uv_sets=uv_sets, normals=normals,
                       material=material, scale=transform_scale(world[:3, :3]), mesh=f"{mesh_index}",
                       vertices=len(positions))


def _strided(data: bytes, start: int, stride: int, dtype, width: int, count: int) -> np.ndarray:
    """(count, width) array read from ``data`` at ``start`` with a row stride in bytes."""
    dtype = np.dtype(dtype).newbyteorder("<")
    return np.ndarray((count, width), dtype=dtype, buffer=data, offset=start,
                      strides=(stride, dtype.itemsize)).copy()


def _triangles_of(indices: np.ndarray, mode: int) -> np.ndarray:
    """(f, 3) triangles of a primitive's index list: list (4), strip (5) or fan (6), glTF 2.0 §3.7.2.1."""
    if mode == 4:
        n = len(indices) // 3
        return indices[: 3 * n].reshape(n, 3)
    if len(indices) < 3:
        return np.zeros((0, 3), np.int64)
    i = np.arange(len(indices) - 2)
    if mode == 5:
        even = (i % 2) == 0
        a = indices[i]
        b = np.where(even, indices[i + 1], indices[i + 2])
        c = np.where(even, indices[i + 2], indices[i + 1])
        return np.stack([a, b, c], axis=1)
    return np.stack([np.full(len(i), indices[0]), indices[i + 1], indices[i + 2]], axis=1)


def _node_matrix(node: dict) -> np.ndarray:
    """4×4 local transform of a glTF node: ``matrix`` (column-major) or T·R·S (glTF 2.0 §5.25)."""
    if "matrix" in node:
        return np.asarray(node["matrix"], dtype=np.float64).reshape(4, 4).T
    t = np.asarray(node.get("translation", [0.0, 0.0, 0.0]), dtype=np.float64)
    x, y, z, w = np.asarray(node.get("rotation", [0.0, 0.0, 0.0, 1.0]), dtype=np.float64)
    s = np.asarray(node.get("scale", [1.0, 1.0, 1.0]), dtype=np.float64)
    r = np.array([
        [1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)],
        [2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)],
        [2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)],
    ])
    m = np.eye(4)
    m[:3, :3] = r * s[None, :]
    m[:3, 3] = t
    return m


# ----------------------------------------------------------------------------------------------- OBJ
def read_obj(path: str, data: bytes | None = None) -> ReadResult:
    """Read a Wavefront OBJ file into parts, one per (object/group, material) run (see the module docstring).

    ``data`` is the file's bytes when the caller has read them already.  Files in the common form (one
    statement per line, positive indices, one corner form for all faces) are parsed in bulk by
    :func:`_parse_obj_bulk`; anything else line by line by :func:`_parse_obj_lines`, which gives the
    same tables and names the line of an error.
    """
    raw = data if data is not None else read_regular_file(path)
    parsed = _parse_obj_bulk(raw, Path(path).stem)
    if parsed is None:
        parsed = _parse_obj_lines(raw.decode("utf-8", errors="replace"), path)
    return _obj_parts(path, *parsed)


#: Bytes that str.splitlines() treats as line breaks besides \\n and \\r\\n; a file holding any goes
#: through the line-by-line parser, which splits exactly as it always has.
_OTHER_LINE_BREAKS = b"\r\x0b\x0c\x1c\x1d\x1e\x85"
_OTHER_LINE_BREAKS_UTF8 = tuple(c.encode() for c in "\u0085\u2028\u2029")
#: Longest line the bulk parser takes (it holds the lines' first bytes in fixed-width arrays).
_OBJ_BULK_LINE = 4096


def _obj_columns(lines: np.ndarray, columns: tuple) -> np.ndarray | None:
    """(n, len(columns)) float64 numbers at token ``columns`` of each line, or None if a line lacks one
    or holds something else (numpy's C text reader; :func:`_parse_obj_lines` takes the same tokens)."""
    if len(lines) == 0:
        return np.zeros((0, len(columns)))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            table = np.loadtxt(io.BytesIO(b"\n".join(lines)), dtype=np.float64, usecols=columns, ndmin=2,
                               comments=None)
    except (ValueError, UserWarning):
        return None
    return table if len(table) == len(lines) else None


def _parse_obj_bulk(data: bytes, stem: str):
    """The tables of :func:`_parse_obj_lines` built with whole-array passes, or None when the file needs
    the line-by-line parser: other line breaks, leading white space, trailing comments, line
    continuations, relative or zero indices, mixed corner forms (``v/t`` beside ``v//n``), short
    ``v``/``vt``/``vn`` lines, unparsable numbers or very long lines."""
    data = data.replace(b"\r\n", b"\n").replace(b"\t", b" ")
    if any(bytes([c]) in data for c in _OTHER_LINE_BREAKS) or b"\\\n" in data:
        return None
    if any(c in data for c in _OTHER_LINE_BREAKS_UTF8):
        return None
    lines = data.split(b"\n")
    first = np.array(lines, dtype="S3")
    if len(data) and max(map(len, lines)) > _OBJ_BULK_LINE:
        return None
    head1 = first.astype("S1")
    if (head1 == b" ").any():
        return None
    comment = head1 == b"#"
    every = np.array(lines, dtype=object)
    if data.count(b"#") != sum(line.count(b"#") for line in every[comment]):
        return None      # a comment after a statement
    head2 = first.astype("S2")
    labels = (head2 == b"o ") | (first == b"o") | (head2 == b"g ") | (first == b"g") | (first == b"use")
    label_at = np.flatnonzero(labels)
    label_lines = [every[i] for i in label_at]
    keep = np.array([line.split(None, 1)[0] in (b"o", b"g", b"usemtl") for line in label_lines], dtype=bool)
    labels[label_at[~keep]] = False
    label_lines = [line for line, k in zip(label_lines, keep) if k]
    positions = _obj_columns(every[head2 == b"v "], (1, 2, 3))
    texcoords = _obj_columns(every[first == b"vt "], (1, 2))
    normals = _obj_columns(every[first == b"vn "], (1, 2, 3))
    if positions is None or texcoords is None or normals is None:
        return None
    is_face = head2 == b"f "
    ordered = np.flatnonzero(is_face | labels)
    face_of_event = is_face[ordered]
    if not is_face.any():
        return (positions, texcoords, normals, np.zeros((0, 11), np.int64), {},
                _obj_face_labels(label_lines, face_of_event, stem)[3])
    parsed = _obj_face_corners(every[is_face])
    if parsed is None:
        return None
    corners, refs = parsed
    # fan each polygon (corners c₀ … c_{m−1}) into triangles (c₀, c_i, c_{i+1}), i = 1 … m − 2
    fans = corners - 2
    face = np.repeat(np.arange(len(corners)), fans)
    start = (np.cumsum(corners) - corners)[face]
    i = expand_ranges(fans) + 1
    a, b, c = refs[start], refs[start + i], refs[start + i + 1]
    part, material, part_names, material_names = _obj_face_labels(label_lines, face_of_event, stem)
    table = np.empty((len(face), 11), np.int64)
    table[:, 0:9:3], table[:, 1:9:3], table[:, 2:9:3] = a, b, c
    table[:, 9], table[:, 10] = part[face], material[face]
    return positions, texcoords, normals, table, part_names, material_names


def _obj_face_corners(faces: np.ndarray):
    """Corner counts and corner references of ``f`` lines, or None for the line parser.

    ``faces`` (n,) object array of the lines (``b"f 1/1/1 2/2/1 3/3/1"``).  Returns (n,) int64 corners
    per face and (Σcorners, 3) int64 0-based (vertex, vt, vn) references, −1 where a corner has none.
    """
    text = b" " + b" ".join(faces) + b" "
    buf = np.frombuffer(text, np.uint8)
    space = buf == ord(" ")
    token_start = np.flatnonzero(~space[1:] & space[:-1]) + 1
    face_start = np.flatnonzero(buf == ord("f"))
    corners = np.diff(np.searchsorted(token_start, np.r_[face_start, len(buf)])) - 1
    first_token = faces[0].split()[1]
    slashes, doubled = first_token.count(b"/"), first_token.count(b"//")
    total = int(corners.sum())
    if corners.min() < 3 or slashes > 2 or not _one_corner_form(buf, token_start, slashes, doubled):
        return None
    fields = (1 + slashes) - doubled
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            ints = np.fromstring(text.replace(b"f", b" ").replace(b"/", b" "), dtype=np.int64, sep=" ")
    except (ValueError, DeprecationWarning):
        return None
    if len(ints) != total * fields or ints.min() <= 0:
        return None
    refs = np.full((total, 3), -1, np.int64)
    ints = ints.reshape(total, fields) - 1
    refs[:, 0] = ints[:, 0]
    if slashes >= 1 and not doubled:
        refs[:, 1] = ints[:, 1]
    if slashes == 2:
        refs[:, 2] = ints[:, -1]
    return corners, refs


def _one_corner_form(buf: np.ndarray, token_start: np.ndarray, slashes: int, doubled: int) -> bool:
    """Whether every corner token of the joined face text has the first corner's form: ``slashes`` '/'
    marks of which ``doubled`` pairs are adjacent ('v', 'v/t', 'v//n' or 'v/t/n').

    ``buf`` (b,) uint8 is the text; ``token_start`` (k,) the offsets of its tokens (``f`` heads and corners).
    """
    slash = np.flatnonzero(buf == ord("/"))
    token_of = np.searchsorted(token_start, slash, side="right") - 1
    per_token = np.bincount(token_of, minlength=len(token_start))
    pairs = slash[:-1][np.diff(slash) == 1]
    per_token_pairs = np.bincount(np.searchsorted(token_start, pairs, side="right") - 1, minlength=len(token_start))
    corner = buf[token_start] != ord("f")
    return bool((per_token[corner] == slashes).all() and (per_token_pairs[corner] == doubled).all())


def _obj_face_labels(labels: list, is_face: np.ndarray, stem: str):
    """(faces,) part and material index of every face, as :func:`_parse_obj_lines` assigns them.

    ``labels`` are the ``o``, ``g`` and ``usemtl`` lines in file order; ``is_face`` holds, for the ``f``
    and label lines in file order, whether each is a face.

    A part is named by the latest ``o`` and ``g`` ("o/g"; ``o`` clears ``g``) and numbered when its first
    face arrives; a material is numbered at its first ``usemtl``.  Only the (few) label statements are
    visited in Python; faces take the labels of the statement before them by a forward fill.
    """
    obj_name = group_name = ""
    material = -1
    part_names: dict[str, int] = {}
    material_names: dict[str, int] = {}
    label_at = np.flatnonzero(~is_face)
    part_of_run, material_of_run = [], []
    # faces before the first label statement form run 0; run k + 1 follows label statement k
    bounds = np.r_[label_at, len(is_face)]
    runs = [(0, bounds[0])] + [(bounds[k] + 1, bounds[k + 1]) for k in range(len(label_at))]
    for k, (lo, hi) in enumerate(runs):
        if k:
            tokens = labels[k - 1].decode("utf-8", errors="replace").split()
            head, text = tokens[0].encode(), " ".join(tokens[1:])
            if head == b"o":
                obj_name, group_name = text, ""
            elif head == b"g":
                group_name = text
            else:
                material = material_names.setdefault(text, len(material_names))
        part = -1
        if hi > lo:
            name = "/".join(x for x in (obj_name, group_name) if x) or stem
            part = part_names.setdefault(name, len(part_names))
        part_of_run.append(part)
        material_of_run.append(material)
    run_of_face = np.cumsum(~is_face)[is_face]
    return (np.asarray(part_of_run, np.int64)[run_of_face], np.asarray(material_of_run, np.int64)[run_of_face],
            part_names, material_names)


def _parse_obj_lines(text: str, path: str):
    """Line-by-line OBJ parse: (positions, texcoords, normals, (t, 11) int64 corner table, part names,
    material names); the table's rows are (v0, v1, v2, t0, t1, t2, n0, n1, n2, part, material), 0-based,
    −1 for a missing reference or material."""
    where = path
    positions, texcoords, normals = [], [], []
    corners: list[tuple] = []   # per triangle: (v0, v1, v2, t0, t1, t2, n0, n1, n2, part, material)
    part_names: dict[str, int] = {}
    material_names: dict[str, int] = {}
    obj_name, group_name, material = "", "", None
    part = None

    def part_index():
        name = "/".join(x for x in (obj_name, group_name) if x) or Path(path).stem
        return part_names.setdefault(name, len(part_names))

    try:
        for line_no, line in enumerate(text.splitlines(), 1):
            tokens = line.split()
            if not tokens or tokens[0].startswith("#"):
                continue
            head = tokens[0]
            if head == "v":
                positions.append([float(x) for x in tokens[1:4]])
            elif head == "vt":
                texcoords.append([float(x) for x in (tokens[1:3] + ["0"])[:2]])
            elif head == "vn":
                normals.append([float(x) for x in tokens[1:4]])
            elif head == "o":
                obj_name, group_name, part = " ".join(tokens[1:]), "", None
            elif head == "g":
                group_name, part = " ".join(tokens[1:]), None
            elif head == "usemtl":
                name = " ".join(tokens[1:])
                material = material_names.setdefault(name, len(material_names))
            elif head == "f":
                if part is None:
                    part = part_index()
                refs = []
                for token in tokens[1:]:
                    fields = token.split("/")
                    v = int(fields[0])
                    t = int(fields[1]) if len(fields) > 1 and fields[1] else 0
                    n = int(fields[2]) if len(fields) > 2 and fields[2] else 0
                    refs.append((_obj_index(v, len(positions)), _obj_index(t, len(texcoords)),
                                 _obj_index(n, len(normals))))
                for i in range(1, len(refs) - 1):  # fan a polygon into triangles
                    a, b, c = refs[0], refs[i], refs[i + 1]
                    corners.append((a[0], b[0], c[0], a[1], b[1], c[1], a[2], b[2], c[2], part,
                                    -1 if material is None else material))
    except (ValueError, IndexError) as exc:
        raise ThickbakeError(f"cannot read the file (line {line_no}: {' '.join(str(exc).split())[:80]})",
                             path=where, fix="re-export it from your modelling tool") from None
    table = np.asarray(corners, dtype=np.int64).reshape(-1, 11)
    return (np.asarray(positions, dtype=np.float64).reshape(-1, 3), np.asarray(texcoords, dtype=np.float64).reshape(-1, 2),
            np.asarray(normals, dtype=np.float64).reshape(-1, 3), table, part_names, material_names)


def _obj_parts(path: str, vertices: np.ndarray, uv: np.ndarray, vn: np.ndarray, table: np.ndarray,
               part_names: dict, material_names: dict) -> ReadResult:
    """Parts and materials from the parsed OBJ tables (see :func:`_parse_obj_lines`)."""
    where = path
    if len(table) == 0:
        return ReadResult(parts=[], materials=[Material(None, None)])
    vi, ti, ni = table[:, 0:3], table[:, 3:6], table[:, 6:9]
    if vi.min() < 0 or vi.max() >= len(vertices):
        raise ThickbakeError(f"a face refers to vertex {int(vi.max()) + 1} of {len(vertices)} (corrupt index data)",
                             path=where, fix="re-export the mesh from your modelling tool")
    if ti.max() >= len(uv) or ni.max() >= len(vn):
        raise ThickbakeError("a face refers to a texture coordinate or normal the file does not have",
                             path=where, fix="re-export the mesh from your modelling tool")
    triangles = vertices[vi]
    has_uv = (ti >= 0).all(axis=1)
    corner_uv = np.full((len(table), 3, 2), np.nan)
    corner_uv[has_uv] = uv[ti[has_uv]]
    has_n = (ni >= 0).all(axis=1)
    corner_n = np.zeros((len(table), 3, 3))
    corner_n[has_n] = vn[ni[has_n]]
    # materials in order of first use; faces before any usemtl have none
    materials = [Material(name, i) for name, i in material_names.items()] + [Material(None, None)]
    mat = np.where(table[:, 10] < 0, len(material_names), table[:, 10])
    names = list(part_names)
    parts = []
    key = table[:, 9] * (len(materials) + 1) + mat
    for k in np.unique(key):
        rows = np.flatnonzero(key == k)
        p, m = int(k // (len(materials) + 1)), int(k % (len(materials) + 1))
        normals_part = corner_n[rows] if has_n[rows].all() else None
        parts.append(Part(name=names[p], aliases=(names[p],) + tuple(names[p].split("/")),
                          triangles=triangles[rows], uv_sets=[corner_uv[rows]], normals=normals_part,
                          material=m, scale=1.0, mesh=names[p], vertices=len(np.unique(vi[rows]))))
    return ReadResult(parts=parts, materials=materials)


def _obj_index(value: int, count: int) -> int:
    """0-based index of an OBJ reference (1-based; negative counts back from the last one read); −1 for none."""
    if value > 0:
        return value - 1
    if value < 0:
        return count + value
    return -1
