"""Input checks done before a mesh file reaches the loader: what may be opened, how much is read,
and the structure trimesh leaves unchecked.

Every check here turns a hostile or broken file into one :class:`ThickbakeError` naming the file,
the line or element where known, and the fix — never a hang, a traceback or a silently wrong mesh.

Limits (README, "What input is refused")
-----------------------------------------
* Files are read through :mod:`thickbake.inputs`: regular files only (never a FIFO or device), at
  most :data:`~thickbake.inputs.MAX_FILE_BYTES` each (the mesh and each external glTF buffer).
* :data:`MAX_FACES` triangles and :data:`MAX_VERTICES` vertices, read from the file's header or a
  cheap pre-scan before the loader allocates anything.
* glTF buffers and images must lie inside the asset's own folder: ``..``, absolute paths and
  ``file:``/``http:`` URIs fail the asset.  :class:`ConfinedResolver` is handed to trimesh so that
  no other file can be opened, and it never substitutes a same-named file from elsewhere.
"""

from __future__ import annotations

import base64
import binascii
import json
import os
import struct
from pathlib import Path

import numpy as np

from thickbake.errors import ThickbakeError
from thickbake.inputs import check_regular_file, confined_path, read_regular_file

#: Most triangles accepted in one asset.  The load keeps ~400 bytes per triangle (corner positions,
#: UVs and normals in float64, the merged trace mesh, the edge tables), so 10 million need ~4 GB.
MAX_FACES = 10_000_000
#: Most vertices accepted in one asset (seam splits make a mesh hold up to 3 per triangle).
MAX_VERTICES = 3 * MAX_FACES
#: The OBJ pre-scan reads this many bytes at a time, so its temporaries stay bounded (~10 x this).
_OBJ_CHUNK_BYTES = 4 * 1024**2
#: Longest vertex index the pre-scan reads (18 digits fit in int64; longer ones are refused).
_MAX_DIGITS = 18

_REEXPORT = "re-export it from your modelling tool"


def _resolver_class():
    import trimesh.resolvers

    class ConfinedResolver(trimesh.resolvers.Resolver):
        """A trimesh resolver that serves only regular files inside one folder (no fallbacks)."""

        def __init__(self, folder, where):
            self.folder = str(folder)
            self.where = str(where)

        def get(self, name):
            path = confined_path(self.folder, name, self.where)
            return read_regular_file(path, what=f"file {name!r} that the asset refers to")

        def keys(self):
            return []

        def write(self, name, data):
            raise ThickbakeError("the loader tried to write a file", path=self.where, fix="report this as a bug")

        def namespaced(self, namespace):
            return ConfinedResolver(os.path.join(self.folder, namespace), self.where)

    return ConfinedResolver


def confined_resolver(folder, where):
    """A :class:`trimesh.resolvers.Resolver` that opens only regular files inside ``folder``."""
    return _resolver_class()(folder, where)


# ---------------------------------------------------------------------------- OBJ
def check_obj(data: bytes, where) -> bytes:
    """Pre-scan OBJ text for what trimesh accepts silently; returns UTF-8 bytes for the loader.

    Checks, in bounded memory (chunks of :data:`_OBJ_CHUNK_BYTES`, numpy on the bytes): no binary
    data, every ``v``/``vn`` line has 3 numbers and every ``vt`` line 2, every ``f`` line has at least
    three corners whose vertex index is a whole number ≠ 0 within the vertices of the file (negative
    indices count back from the last vertex defined before the line), and the counts stay under
    :data:`MAX_VERTICES`/:data:`MAX_FACES`.
    """
    if b"\x00" in data:
        raise ThickbakeError("holds binary data, not OBJ text", path=where,
                             fix="give a text OBJ file, or rename the file to its real type (.glb, .ply, ...)")
    try:
        data.decode("utf-8")
    except UnicodeDecodeError:
        # names and comments in a legacy 8-bit encoding: numbers are ASCII either way
        data = data.decode("latin-1").encode("utf-8")
    vertices = 0
    triangles = 0
    max_index, max_line = 0, 0
    line_base = 0
    start = 0
    size = len(data)
    while start < size:
        end = data.rfind(b"\n", start, min(size, start + _OBJ_CHUNK_BYTES)) + 1 if start + _OBJ_CHUNK_BYTES < size else size
        if end <= start:
            end = min(size, data.find(b"\n", start) + 1 or size)
        chunk = np.frombuffer(data, dtype=np.uint8, count=end - start, offset=start)
        v, t, hi, hi_line, lines = _scan_obj_chunk(chunk, vertices, line_base, where)
        vertices += v
        triangles += t
        if hi > max_index:
            max_index, max_line = hi, hi_line
        line_base += lines
        if vertices > MAX_VERTICES or triangles > MAX_FACES:
            raise ThickbakeError(f"has over {MAX_VERTICES:,} vertices or {MAX_FACES:,} triangles (the limit)", path=where,
                                 fix="decimate the mesh or split it into several assets")
        start = end
    if max_index > vertices:
        raise ThickbakeError(f"line {max_line}: a face refers to vertex {max_index} but the file defines only "
                             f"{vertices}", path=where, fix=_REEXPORT)
    return data


def _scan_obj_chunk(chunk: np.ndarray, vertices_before: int, line_base: int, where):
    """One chunk of whole lines: (vertices, triangles, largest index, its line, line count)."""
    newline = chunk == 10
    nl = np.flatnonzero(newline)
    ends = nl if (len(chunk) and chunk[-1] == 10) else np.append(nl, len(chunk))
    n_lines = len(ends)
    newlines_before = np.cumsum(newline, dtype=np.int32)  # line of byte i (not itself a newline)
    space = (chunk == 32) | ((chunk >= 9) & (chunk <= 13))
    token_start = ~space
    token_start[1:] &= space[:-1]
    starts_of_tokens = np.flatnonzero(token_start)
    lines_of_tokens = newlines_before[starts_of_tokens]
    # a '#' starts a comment: only the tokens before the first one on a line count
    hashes = np.flatnonzero(chunk == ord("#"))
    if len(hashes):
        first_hash = ends.copy()
        lines_of_hashes = newlines_before[hashes]
        first = np.concatenate(([True], lines_of_hashes[1:] != lines_of_hashes[:-1]))
        first_hash[lines_of_hashes[first]] = hashes[first]
        keep = starts_of_tokens < first_hash[lines_of_tokens]
        starts_of_tokens, lines_of_tokens = starts_of_tokens[keep], lines_of_tokens[keep]
    tokens = np.bincount(lines_of_tokens, minlength=n_lines)
    # each line's keyword is its first token (lines may be indented)
    keyword = np.full(n_lines, len(chunk))
    first_token = np.ones(len(lines_of_tokens), bool)
    first_token[1:] = lines_of_tokens[1:] != lines_of_tokens[:-1]
    keyword[lines_of_tokens[first_token]] = starts_of_tokens[first_token]
    padded = np.concatenate((chunk, np.zeros(_MAX_DIGITS + 2, np.uint8)))
    c0, c1, c2 = padded[keyword], padded[keyword + 1], padded[keyword + 2]
    blank1 = (c1 == 32) | (c1 == 9)
    blank2 = (c2 == 32) | (c2 == 9)
    is_v = (c0 == ord("v")) & blank1
    is_vt = (c0 == ord("v")) & (c1 == ord("t")) & blank2
    is_vn = (c0 == ord("v")) & (c1 == ord("n")) & blank2
    is_f = (c0 == ord("f")) & blank1
    for mask, need, what in ((is_v, 4, "a vertex line 'v' needs 3 numbers"),
                             (is_vt, 3, "a texture coordinate line 'vt' needs 2 numbers"),
                             (is_vn, 4, "a normal line 'vn' needs 3 numbers"),
                             (is_f, 4, "a face line 'f' needs at least 3 corners")):
        short = np.flatnonzero(mask & (tokens < need))
        if len(short):
            raise ThickbakeError(f"line {line_base + short[0] + 1}: {what}, it has {tokens[short[0]] - 1}",
                                 path=where, fix=_REEXPORT)
    n_vertices = int(is_v.sum())
    triangles = int((tokens[is_f] - 3).sum())
    corner = is_f[lines_of_tokens] & ~first_token  # tokens of face lines after the 'f'
    pos = starts_of_tokens[corner]
    if len(pos) == 0:
        return n_vertices, triangles, 0, 0, n_lines
    lines_of_corner = lines_of_tokens[corner]
    values, ok = _parse_ints(padded, pos)
    if not ok.all():
        line = line_base + lines_of_corner[np.argmin(ok)] + 1
        raise ThickbakeError(f"line {line}: a face corner is not a vertex number (a whole number of at most "
                             f"{_MAX_DIGITS} digits)", path=where, fix=_REEXPORT)
    zero = np.flatnonzero(values == 0)
    if len(zero):
        raise ThickbakeError(f"line {line_base + lines_of_corner[zero[0]] + 1}: a face refers to vertex 0, but OBJ "
                             "numbers vertices from 1", path=where, fix=_REEXPORT)
    v_before = vertices_before + np.cumsum(is_v) - is_v  # vertices defined before each line
    neg = values < 0
    back = np.flatnonzero(neg & (-values > v_before[lines_of_corner]))
    if len(back):
        k = back[0]
        raise ThickbakeError(f"line {line_base + lines_of_corner[k] + 1}: a face refers to vertex {values[k]}, "
                             f"but only {v_before[lines_of_corner[k]]} are defined before it", path=where,
                             fix=_REEXPORT)
    hi, hi_line = 0, 0
    if (~neg).any():
        k = int(np.argmax(np.where(neg, 0, values)))
        hi, hi_line = int(values[k]), int(line_base + lines_of_corner[k] + 1)
    return n_vertices, triangles, hi, hi_line, n_lines


def _parse_ints(padded: np.ndarray, pos: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Signed decimal integers starting at byte positions ``pos``; (values int64, parsed ok).

    ``padded`` ends with at least ``_MAX_DIGITS + 2`` zero bytes.  A corner is ``v``, ``v/t``,
    ``v//n`` or ``v/t/n``: after 1 to :data:`_MAX_DIGITS` digits comes '/', a blank or the end.
    Digit by digit over the numbers still being read, so the work is the total number of digits.
    """
    negative = padded[pos] == ord("-")
    at = pos + negative
    values = np.zeros(len(pos), np.int64)
    ok = np.zeros(len(pos), bool)
    alive = np.arange(len(pos))
    for length in range(_MAX_DIGITS + 1):
        c = padded[at[alive] + length]
        digit = (c >= 48) & (c <= 57)
        ended = alive[~digit]
        ok[ended] = (length > 0) & np.isin(c[~digit], (47, 32, 9, 13, 10, 11, 12, 35, 0))
        alive = alive[digit]
        if not len(alive):
            break
        if length < _MAX_DIGITS:
            values[alive] = values[alive] * 10 + (c[digit].astype(np.int64) - 48)
    # numbers still being read after _MAX_DIGITS digits stay not ok
    return np.where(negative, -values, values), ok


# ---------------------------------------------------------------------------- PLY
_PLY_TYPES = {"char": 1, "int8": 1, "uchar": 1, "uint8": 1, "short": 2, "int16": 2, "ushort": 2, "uint16": 2,
              "int": 4, "int32": 4, "uint": 4, "uint32": 4, "float": 4, "float32": 4, "double": 8, "float64": 8}


def _ply_header_element(words: list[str], elements: list[list]) -> None:
    """Add a PLY header ``element`` line to ``elements`` ([name, count, fixed bytes, list-count bytes]) or
    a ``property`` line's bytes to the last element; raises ValueError/IndexError on a malformed line."""
    if words[0] == "element":
        count = int(words[2])
        if count < 0:
            raise ValueError
        elements.append([words[1], count, 0, 0])
    elif words[0] == "property":
        is_list = words[1] == "list"
        types = [words[2], words[3]] if is_list else [words[1]]
        if not elements or any(t not in _PLY_TYPES for t in types):
            raise ValueError
        elements[-1][3 if is_list else 2] += _PLY_TYPES[types[0]]


def check_ply(data: bytes, where) -> None:
    """Check a PLY header and that the file can hold the element counts it announces."""
    if not data.startswith(b"ply") or data[3:4] not in (b"\n", b"\r"):
        raise ThickbakeError("does not start with the PLY header ('ply')", path=where,
                             fix="give a PLY file, or rename the file to its real type")
    end = data.find(b"end_header", 0, 1 << 16)
    if end < 0:
        raise ThickbakeError("the PLY header has no 'end_header' in its first 64 KB", path=where, fix=_REEXPORT)
    try:
        header = data[:end].decode("ascii").splitlines()
    except UnicodeDecodeError:
        raise ThickbakeError("the PLY header is not ASCII text", path=where, fix=_REEXPORT) from None
    body_start = data.find(b"\n", end) + 1 or len(data)
    body = len(data) - body_start
    fmt = None
    elements: list[list] = []  # [name, count, fixed bytes, list properties]
    for number, line in enumerate(header, start=1):
        words = line.split()
        if not words:
            continue
        try:
            if words[0] == "format":
                fmt = words[1]
            else:
                _ply_header_element(words, elements)
        except (ValueError, IndexError):
            raise ThickbakeError(f"PLY header line {number} is not valid ({line.strip()[:60]!r})", path=where,
                                 fix=_REEXPORT) from None
    if fmt not in ("ascii", "binary_little_endian", "binary_big_endian"):
        raise ThickbakeError(f"unknown PLY format {fmt!r}", path=where, fix=_REEXPORT)
    counts = {name: count for name, count, _, _ in elements}
    if counts.get("vertex", 0) > MAX_VERTICES or counts.get("face", 0) > MAX_FACES:
        raise ThickbakeError(f"the PLY header announces {counts.get('vertex', 0):,} vertices and "
                             f"{counts.get('face', 0):,} faces, over the limit of {MAX_VERTICES:,} and {MAX_FACES:,}",
                             path=where, fix="decimate the mesh or split it into several assets")
    if fmt == "ascii":
        lines = data.count(b"\n", body_start) + 1
        need = sum(count for _, count, _, _ in elements)
        if need > lines:
            raise ThickbakeError(f"the PLY header announces {need:,} element lines but the file has {lines:,}",
                                 path=where, fix="the file is cut short: " + _REEXPORT)
    else:
        need = sum(count * (fixed + lists) for _, count, fixed, lists in elements)
        if need > body:
            raise ThickbakeError(f"the PLY header announces at least {need:,} bytes of data but the file holds "
                                 f"{body:,}", path=where, fix="the file is cut short: " + _REEXPORT)


# ---------------------------------------------------------------------------- glTF / GLB
_COMPONENT_BYTES = {5120: 1, 5121: 1, 5122: 2, 5123: 2, 5125: 4, 5126: 4}
_TYPE_COMPONENTS = {"SCALAR": 1, "VEC2": 2, "VEC3": 3, "VEC4": 4, "MAT2": 4, "MAT3": 9, "MAT4": 16}


def check_glb(data: bytes, where) -> tuple[dict, int]:
    """Check a GLB container (glTF 2.0 §4.4) and its JSON; returns (document, BIN chunk length)."""
    fix = "the file is damaged or not a GLB: " + _REEXPORT
    if len(data) < 20:
        raise ThickbakeError(f"is {len(data)} bytes, too short for a GLB file", path=where, fix=fix)
    magic, version, length = struct.unpack_from("<4sII", data, 0)
    if magic != b"glTF":
        raise ThickbakeError("does not start with the GLB magic 'glTF'", path=where,
                             fix="give a binary glTF file, or rename the file to its real type (.gltf, .obj, ...)")
    if version != 2:
        raise ThickbakeError(f"is GLB version {version}; only glTF 2.0 is read", path=where, fix="export as glTF 2.0")
    if length != len(data):
        raise ThickbakeError(f"the GLB header gives a length of {length:,} bytes but the file has {len(data):,}",
                             path=where, fix=fix)
    chunk_length, chunk_type = struct.unpack_from("<I4s", data, 12)
    if chunk_type != b"JSON" or 20 + chunk_length > len(data):
        raise ThickbakeError("the GLB's first chunk is not a complete JSON chunk", path=where, fix=fix)
    document = _parse_json(data[20:20 + chunk_length], where)
    bin_length = 0
    at = 20 + chunk_length
    if at + 8 <= len(data):
        bin_size, bin_type = struct.unpack_from("<I4s", data, at)
        if bin_type == b"BIN\x00":
            if at + 8 + bin_size > len(data):
                raise ThickbakeError("the GLB's binary chunk runs past the end of the file", path=where, fix=fix)
            bin_length = bin_size
    return document, bin_length


def _parse_json(blob: bytes, where) -> dict:
    try:
        document = json.loads(blob.decode("utf-8"))
    except UnicodeDecodeError:
        raise ThickbakeError("the glTF JSON is not UTF-8 text", path=where, fix=_REEXPORT) from None
    except ValueError as exc:
        line = getattr(exc, "lineno", None)
        place = f" at line {line}, column {exc.colno}" if line else ""
        raise ThickbakeError(f"the glTF JSON is broken{place} ({getattr(exc, 'msg', exc)})", path=where,
                             fix="repair the JSON or " + _REEXPORT) from None
    except RecursionError:
        raise ThickbakeError("the glTF JSON is nested too deeply", path=where, fix=_REEXPORT) from None
    if not isinstance(document, dict):
        raise ThickbakeError("the glTF JSON is not an object", path=where, fix=_REEXPORT)
    return document


def check_gltf(data: bytes, where) -> None:
    """Check a ``.gltf`` file's JSON, its buffers and images (confined to its folder)."""
    check_gltf_document(_parse_json(data, where), where, folder=Path(where).parent, bin_length=None)


def check_gltf_document(doc: dict, where, folder, bin_length: int | None) -> None:
    """Check what trimesh does not: buffers exist with the bytes they claim, buffer views and accessors
    lie inside them, indices are valid, and every external file is inside ``folder``.

    ``bin_length`` is the GLB binary chunk's length (None for a ``.gltf``).  Raises
    :class:`ThickbakeError` naming the first offending element (``accessors[3]``, ...).
    """
    check = _GltfDocumentCheck(doc, where, folder)
    check.asset_version()
    sizes = check.buffers(bin_length)
    views = check.buffer_views(sizes)
    counts = check.accessors(views)
    check.triangle_count(counts)
    check.images()


class _GltfDocumentCheck:
    """The steps of :func:`check_gltf_document`, in the order glTF elements refer to each other
    (buffers ← bufferViews ← accessors ← meshes), each returning what the next one needs."""

    def __init__(self, doc: dict, where, folder):
        self.doc, self.where, self.folder = doc, where, folder

    def fail(self, element: str, message: str, fix: str = _REEXPORT):
        raise ThickbakeError(f"{element}: {message}", path=self.where, fix=fix)

    def items(self, key) -> list:
        value = self.doc.get(key, [])
        if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
            self.fail(key, "is not a list of objects")
        return value

    def whole(self, value, element, name, low=0) -> int:
        if isinstance(value, bool) or not isinstance(value, int) or value < low:
            self.fail(element, f"{name} {value!r} is not a whole number ≥ {low}")
        return value

    def asset_version(self) -> None:
        asset = self.doc.get("asset")
        if not isinstance(asset, dict) or not str(asset.get("version", "")).startswith("2"):
            self.fail("asset", "no glTF 2.0 'asset.version'", "export as glTF 2.0")

    def buffers(self, bin_length: int | None) -> list[int]:
        """byteLength of every buffer, after checking that its bytes are there."""
        sizes = []
        for i, buffer in enumerate(self.items("buffers")):
            element = f"buffers[{i}]"
            length = self.whole(buffer.get("byteLength"), element, "byteLength", 1)
            available = self._buffer_bytes(element, buffer.get("uri"), i, bin_length)
            if available < length:
                self.fail(element, f"byteLength is {length:,} but only {available:,} bytes are there")
            sizes.append(length)
        return sizes

    def _buffer_bytes(self, element: str, uri, index: int, bin_length: int | None) -> int:
        """Bytes available to a buffer: the GLB chunk, a base64 data URI, or a file inside the folder."""
        if uri is None:
            if bin_length is None or index != 0:
                self.fail(element, "has no uri and there is no GLB binary chunk")
            return bin_length
        if not isinstance(uri, str):
            self.fail(element, "uri is not a string")
        if not uri.startswith("data:"):
            path = confined_path(self.folder, uri, self.where)
            return check_regular_file(path, what=f"buffer {uri!r} of the asset").st_size
        comma = uri.find(",")
        if comma < 0 or ";base64" not in uri[:comma]:
            self.fail(element, "data URI is not base64")
        try:
            return len(base64.b64decode(uri[comma + 1:], validate=True))
        except (binascii.Error, ValueError):
            self.fail(element, "data URI holds invalid base64")

    def buffer_views(self, sizes: list[int]) -> list[dict]:
        views = self.items("bufferViews")
        for i, view in enumerate(views):
            element = f"bufferViews[{i}]"
            b = self.whole(view.get("buffer"), element, "buffer")
            if b >= len(sizes):
                self.fail(element, f"refers to buffer {b}, but there are {len(sizes)}")
            offset = self.whole(view.get("byteOffset", 0), element, "byteOffset")
            length = self.whole(view.get("byteLength"), element, "byteLength", 1)
            if offset + length > sizes[b]:
                self.fail(element, f"bytes {offset:,}..{offset + length:,} lie beyond buffer {b} ({sizes[b]:,} bytes)")
            if "byteStride" in view:
                self.whole(view["byteStride"], element, "byteStride", 4)
        return views

    def accessors(self, views: list[dict]) -> list[int]:
        """Element count of every accessor, after checking that its elements lie inside its buffer view."""
        counts = []
        for i, acc in enumerate(self.items("accessors")):
            element = f"accessors[{i}]"
            count = self.whole(acc.get("count"), element, "count", 1)
            if acc.get("componentType") not in _COMPONENT_BYTES:
                self.fail(element, f"componentType {acc.get('componentType')!r} is not a glTF component type")
            if acc.get("type") not in _TYPE_COMPONENTS:
                self.fail(element, f"type {acc.get('type')!r} is not a glTF accessor type")
            if count > MAX_VERTICES * 3:
                self.fail(element, f"count {count:,} is over the limit", "decimate the mesh or split it into several assets")
            counts.append(count)
            if "bufferView" in acc:  # without one: all zeros (or sparse), nothing to read
                self._accessor_extent(element, acc, count, views)
        return counts

    def _accessor_extent(self, element: str, acc: dict, count: int, views: list[dict]) -> None:
        v = self.whole(acc.get("bufferView"), element, "bufferView")
        if v >= len(views):
            self.fail(element, f"refers to bufferView {v}, but there are {len(views)}")
        element_bytes = _COMPONENT_BYTES[acc["componentType"]] * _TYPE_COMPONENTS[acc["type"]]
        stride = views[v].get("byteStride") or element_bytes
        offset = self.whole(acc.get("byteOffset", 0), element, "byteOffset")
        end = offset + stride * (count - 1) + element_bytes
        if end > views[v]["byteLength"]:
            self.fail(element, f"{count:,} elements from byte {offset:,} need {end:,} bytes, but bufferView {v} has "
                               f"{views[v]['byteLength']:,}")

    def triangle_count(self, counts: list[int]) -> int:
        """Triangles over all primitives (their accessor references checked), within :data:`MAX_FACES`."""
        triangles = 0
        for m, mesh in enumerate(self.items("meshes")):
            primitives = mesh.get("primitives", [])
            if not isinstance(primitives, list):
                self.fail(f"meshes[{m}]", "primitives is not a list")
            for p, prim in enumerate(primitives):
                triangles += self._primitive_triangles(f"meshes[{m}].primitives[{p}]", prim, counts)
        if triangles > MAX_FACES:
            self.fail("meshes", f"{triangles:,} triangles, over the limit of {MAX_FACES:,}",
                      "decimate the mesh or split it into several assets")
        return triangles

    def _primitive_triangles(self, element: str, prim, counts: list[int]) -> int:
        if not isinstance(prim, dict) or not isinstance(prim.get("attributes", {}), dict):
            self.fail(element, "is not a primitive object")
        refs = list(prim.get("attributes", {}).values()) + ([prim["indices"]] if "indices" in prim else [])
        for ref in refs:
            self.whole(ref, element, "accessor")
            if ref >= len(counts):
                self.fail(element, f"refers to accessor {ref}, but there are {len(counts)}")
        if "indices" in prim:
            return counts[prim["indices"]] // 3
        if "POSITION" in prim.get("attributes", {}):
            return counts[prim["attributes"]["POSITION"]] // 3
        return 0

    def images(self) -> None:
        """Every external image file lies inside the folder."""
        for i, image in enumerate(self.items("images")):
            uri = image.get("uri")
            if isinstance(uri, str) and not uri.startswith("data:"):
                confined_path(self.folder, uri, self.where)
            elif uri is not None and not isinstance(uri, str):
                self.fail(f"images[{i}]", "uri is not a string")
