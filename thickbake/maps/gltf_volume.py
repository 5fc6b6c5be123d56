"""Write baked thickness maps back into a glTF asset as ``KHR_materials_volume``.

:func:`read_gltf` reads a ``.glb`` (JSON and BIN chunks) or a ``.gltf`` (JSON, buffers and images
beside it); :func:`plan_volume` checks, before any baking, which materials can receive a map and the
scale of the nodes that draw them; :func:`add_volume` adds the images, samplers and textures and sets
on each baked material

``extensions.KHR_materials_volume = {thicknessTexture: {index, texCoord}, thicknessFactor,
[attenuationColor, attenuationDistance]}``

(and ``KHR_materials_transmission`` on request), adding the extension names to ``extensionsUsed``.
Everything else is kept as it was: meshes, accessors, buffer views, other materials, textures and
their extensions, extras, nodes, skins, animations, and in a GLB every byte of the BIN chunk (the
images are appended after it, 4-byte aligned, glTF 2.0 §4.4.3.3).  JSON values are kept exactly
(integers stay integers, floats round-trip through their shortest repr); only the whitespace of the
JSON text changes.

Units (KHR_materials_volume): the thickness "is given in the coordinate space of the mesh", so the
node transforms apply to it.  thickbake bakes in world space (node transforms applied), where a code
``c`` of a non-inverted thickness PNG means ``c / code_max × reach`` world units.  For a material drawn
by nodes of uniform world scale ``s`` the local thickness is the world thickness over ``s``, hence

    thicknessFactor = reach / s,   so that   G / code_max × thicknessFactor = local thickness.

A material drawn at different scales, or by a node with a non-uniform scale, has no single such factor
and is refused with a message.  ``attenuationDistance`` is in world space (the extension says so) and
needs no such conversion.

References
----------
Khronos glTF 2.0 specification (§3.8.4 images, §4.4 GLB); KHR_materials_volume and
KHR_materials_transmission extension specifications (ratified).
"""

from __future__ import annotations

import json
import os
import posixpath
import struct
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import quote, unquote

import numpy as np

from thickbake.constants import UNIFORM_SCALE_TOLERANCE
from thickbake.errors import ThickbakeError

GLB_MAGIC = 0x46546C67  # "glTF"
CHUNK_JSON = 0x4E4F534A  # "JSON"
CHUNK_BIN = 0x004E4942  # "BIN\0"
GLTF_SUFFIXES = (".glb", ".gltf")
EXTENSION = "KHR_materials_volume"
TRANSMISSION = "KHR_materials_transmission"
DIFFUSE_TRANSMISSION = "KHR_materials_diffuse_transmission"
#: glTF sampler: LINEAR magnification, LINEAR_MIPMAP_LINEAR minification (wrap stays REPEAT).
SAMPLER = {"magFilter": 9729, "minFilter": 9987}


@dataclass
class GltfFile:
    """A glTF asset in memory.

    Attributes
    ----------
    path : Path
    kind : {"glb", "gltf"}
    doc : dict
        The JSON document.
    bin : bytes or None
        The GLB BIN chunk as stored (including its padding), None for .gltf or a GLB without one.
    extra_chunks : list of (int, bytes)
        GLB chunks after JSON and BIN of types this code does not know (kept as they are).
    """

    path: Path
    kind: str
    doc: dict
    bin: bytes | None = None
    extra_chunks: list = field(default_factory=list)


@dataclass(frozen=True)
class VolumeMap:
    """One baked thickness map to attach to materials.

    Attributes
    ----------
    png : bytes
        The map as a grey (or RGB) PNG, codes proportional to world thickness; untagged (see maps.png).
    reach : float
        World thickness of the top code (scene units).
    uv_set : int
        The TEXCOORD set the map was baked in (glTF ``texCoord``).
    materials : tuple of int or None
        Material indices the map belongs to; None = every material on a primitive with that UV set.
    name : str
        Image name (also the file name stem beside a .gltf).
    attenuation_color : (3,) floats or None
    attenuation_distance : float or None
        World units; with the colour, Beer's law T(x) = color^(x / distance).
    """

    png: bytes
    reach: float
    uv_set: int = 0
    materials: tuple[int, ...] | None = None
    name: str = "thickness"
    attenuation_color: tuple[float, float, float] | None = None
    attenuation_distance: float | None = None


@dataclass
class VolumePlan:
    """Materials that can take a map of one UV set, and the uniform world scale each is drawn at."""

    source: Path
    uv_set: int
    scales: dict[int, float]
    skipped: dict[int, str]

    def factor(self, material: int, reach: float) -> float:
        """thicknessFactor in the mesh's local units for a map whose top code is ``reach`` world units."""
        return float(reach) / self.scales[material]


# ---------------------------------------------------------------------------- reading and writing
def read_gltf(path: str | os.PathLike) -> GltfFile:
    """Read a .glb or .gltf file (external buffers of a .gltf stay on disk)."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in GLTF_SUFFIXES:
        raise ThickbakeError("writing a glTF copy needs a glTF input (.glb or .gltf)", path=path,
                             fix="export the asset as glTF, or leave --write-gltf out")
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise ThickbakeError(f"cannot read the file ({exc.strerror or exc})", path=path, fix="check the path") from None
    if suffix == ".gltf":
        return GltfFile(path=path, kind="gltf", doc=_parse_json(data, path))
    if len(data) < 20:
        raise ThickbakeError("the GLB file is truncated", path=path, fix="export the asset again")
    magic, version, length = struct.unpack_from("<III", data, 0)
    if magic != GLB_MAGIC or version != 2:
        raise ThickbakeError("not a glTF 2.0 binary file", path=path, fix="export the asset as glTF 2.0 (.glb)")
    pos = 12
    doc, bin_chunk, extra = None, None, []
    end = min(length, len(data))
    while pos + 8 <= end:
        chunk_length, chunk_type = struct.unpack_from("<II", data, pos)
        body = data[pos + 8:pos + 8 + chunk_length]
        if len(body) != chunk_length:
            raise ThickbakeError("the GLB file is truncated", path=path, fix="export the asset again")
        if doc is None:
            if chunk_type != CHUNK_JSON:
                raise ThickbakeError("the GLB file does not start with a JSON chunk", path=path,
                                     fix="export the asset again")
            doc = _parse_json(body, path)
        elif chunk_type == CHUNK_BIN and bin_chunk is None and not extra:
            bin_chunk = body
        else:
            extra.append((chunk_type, body))
        pos += 8 + chunk_length
    if doc is None:
        raise ThickbakeError("the GLB file has no JSON chunk", path=path, fix="export the asset again")
    return GltfFile(path=path, kind="glb", doc=doc, bin=bin_chunk, extra_chunks=extra)


def _parse_json(data: bytes, path: Path) -> dict:
    try:
        doc = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise ThickbakeError(f"the glTF JSON is not valid ({exc})", path=path, fix="export the asset again") from None
    if not isinstance(doc, dict):
        raise ThickbakeError("the glTF JSON is not an object", path=path, fix="export the asset again")
    return doc


def _json_text(doc: dict) -> bytes:
    return json.dumps(doc, separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode("utf-8")


def glb_bytes(doc: dict, bin_chunk: bytes | None, extra_chunks=()) -> bytes:
    """Assemble a GLB: header, JSON chunk padded with spaces, BIN chunk padded with zeros (§4.4.3)."""
    text = _json_text(doc)
    text += b" " * (-len(text) % 4)
    parts = [struct.pack("<II", len(text), CHUNK_JSON), text]
    if bin_chunk is not None:
        body = bin_chunk + b"\0" * (-len(bin_chunk) % 4)
        parts += [struct.pack("<II", len(body), CHUNK_BIN), body]
    for chunk_type, body in extra_chunks:
        parts += [struct.pack("<II", len(body), chunk_type), body]
    payload = b"".join(parts)
    return struct.pack("<III", GLB_MAGIC, 2, 12 + len(payload)) + payload


# ---------------------------------------------------------------------------- planning
def _node_matrix(node: dict) -> np.ndarray:
    """Local 4x4 transform of a node (glTF 2.0 §3.5.3: column-major ``matrix`` or T·R·S)."""
    if "matrix" in node:
        return np.asarray(node["matrix"], np.float64).reshape(4, 4).T
    t = np.asarray(node.get("translation", [0, 0, 0]), np.float64)
    x, y, z, w = np.asarray(node.get("rotation", [0, 0, 0, 1]), np.float64)
    s = np.asarray(node.get("scale", [1, 1, 1]), np.float64)
    rot = np.array([[1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)],
                    [2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)],
                    [2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)]])
    out = np.eye(4)
    out[:3, :3] = rot * s[None, :]
    out[:3, 3] = t
    return out


def mesh_instances(doc: dict) -> list[tuple[int, int, np.ndarray]]:
    """(node, mesh, world 4x4) for every node that draws a mesh in the default scene.

    Without scenes every root node counts (glTF allows a file with no scene).
    """
    nodes = doc.get("nodes", []) or []
    scenes = doc.get("scenes", []) or []
    if scenes:
        scene = scenes[doc.get("scene", 0)] if isinstance(doc.get("scene", 0), int) and doc.get("scene", 0) < len(scenes) else scenes[0]
        roots = list(scene.get("nodes", []))
    else:
        children = {c for n in nodes for c in n.get("children", [])}
        roots = [i for i in range(len(nodes)) if i not in children]
    out = []
    stack = [(r, np.eye(4)) for r in roots]
    seen = 0
    while stack:
        index, parent = stack.pop()
        seen += 1
        if seen > 10 * len(nodes) + 10:  # a cycle: the validator reports it; stop rather than loop
            break
        node = nodes[index]
        world = parent @ _node_matrix(node)
        if "mesh" in node:
            out.append((index, int(node["mesh"]), world))
        stack.extend((c, world) for c in node.get("children", []))
    return out


def uniform_scale(world: np.ndarray) -> float | None:
    """The scale of a similarity transform's 3x3 part, or None when the scale is not uniform."""
    sv = np.linalg.svd(world[:3, :3], compute_uv=False)
    if sv.min() <= 0 or sv.max() / sv.min() - 1 > UNIFORM_SCALE_TOLERANCE:
        return None
    return float(sv.mean())


def plan_volume(path: str | os.PathLike, uv_set: int = 0, materials=None) -> VolumePlan:
    """Check that a glTF asset can take thickness maps of ``uv_set`` and find each material's scale.

    Raises
    ------
    ThickbakeError
        Not a glTF, no material has triangles with that UV set, or a material is drawn at a
        non-uniform or at several different scales (no single thicknessFactor fits it).
    """
    gf = read_gltf(path)
    doc = gf.doc
    meshes = doc.get("meshes", []) or []
    n_materials = len(doc.get("materials", []) or [])
    uses: dict[int, set[int]] = {}
    skipped: dict[int, str] = {}
    attribute = f"TEXCOORD_{int(uv_set)}"
    for mesh_index, mesh in enumerate(meshes):
        for prim in mesh.get("primitives", []):
            if prim.get("mode", 4) != 4 or "material" not in prim:
                continue
            material = int(prim["material"])
            if attribute in prim.get("attributes", {}):
                uses.setdefault(material, set()).add(mesh_index)
            else:
                skipped.setdefault(material, f"its primitives have no {attribute}")
    if materials is not None:
        wanted = set(int(m) for m in materials)
        uses = {m: v for m, v in uses.items() if m in wanted}
    scales: dict[int, float] = {}
    instances = mesh_instances(doc)
    for material, mesh_set in sorted(uses.items()):
        found = []
        for node, mesh, world in instances:
            if mesh in mesh_set:
                s = uniform_scale(world)
                if s is None:
                    raise ThickbakeError(
                        f"material {_material_label(doc, material)} is drawn by node {node} with a non-uniform "
                        "scale, so no single thicknessFactor in the mesh's units fits it", path=gf.path,
                        fix="apply the node's scale to the mesh in your modelling tool and export again")
                found.append(s)
        if not found:
            skipped[material] = "no node of the scene draws it"
            continue
        if max(found) / min(found) - 1 > UNIFORM_SCALE_TOLERANCE:
            raise ThickbakeError(
                f"material {_material_label(doc, material)} is drawn at different scales "
                f"({min(found):g} to {max(found):g}), so no single thicknessFactor in the mesh's units fits it",
                path=gf.path, fix="give the differently scaled instances their own material, or apply the scales")
        scales[material] = float(np.mean(found))
        skipped.pop(material, None)
    if not scales:
        raise ThickbakeError(f"no material of the asset is on triangles with {attribute} drawn by the scene",
                             path=gf.path, fix="give the baked primitives a material and UV coordinates")
    assert all(0 <= m < n_materials for m in scales), "primitive refers to a missing material"
    return VolumePlan(source=gf.path, uv_set=int(uv_set), scales=scales, skipped=skipped)


def _material_label(doc: dict, index: int) -> str:
    mats = doc.get("materials", []) or []
    name = mats[index].get("name") if index < len(mats) else None
    return f"#{index} ({name!r})" if name else f"#{index}"


# ---------------------------------------------------------------------------- adding the maps
def add_volume(gf: GltfFile, plan: VolumePlan, maps: list[VolumeMap], transmission: float | None = None,
               image_names: list[str] | None = None) -> tuple[GltfFile, dict[str, bytes], dict]:
    """A copy of ``gf`` whose materials carry the maps, plus side files and a report.

    Parameters
    ----------
    gf : GltfFile
    plan : VolumePlan
        From :func:`plan_volume` on the same file.
    maps : list of VolumeMap
        Each attaches to ``map.materials`` (or every planned material when None).
    transmission : float in [0, 1] or None
        Also set ``KHR_materials_transmission.transmissionFactor`` on the baked materials.
    image_names : list of str, optional
        For a .gltf: file names (beside the output) of the images, one per map.

    Returns
    -------
    (GltfFile, {file name: bytes} written beside a .gltf, report dict)
    """
    doc = json.loads(json.dumps(gf.doc))  # a deep copy that keeps every value
    bin_chunk = gf.bin
    side: dict[str, bytes] = {}
    samplers = doc.setdefault("samplers", [])
    sampler_index = len(samplers)
    samplers.append(dict(SAMPLER))
    report = {"materials": [], "skipped": {str(k): v for k, v in sorted(plan.skipped.items())}}
    claimed: dict[int, int] = {}
    for number, vmap in enumerate(maps):
        targets = sorted(plan.scales) if vmap.materials is None else [m for m in vmap.materials if m in plan.scales]
        for material in targets:
            if material in claimed:
                raise ThickbakeError(f"material {_material_label(doc, material)} would get two thickness maps "
                                     f"(maps {claimed[material]} and {number})", path=gf.path,
                                     fix="bake one map per material")
            claimed[material] = number
        if not targets:
            continue
        if gf.kind == "glb":
            bin_chunk, view = _append_view(doc, bin_chunk, vmap.png)
            image = {"bufferView": view, "mimeType": "image/png", "name": vmap.name}
        else:
            name = image_names[number] if image_names else f"{vmap.name}.png"
            side[name] = vmap.png
            image = {"uri": quote(name), "name": vmap.name}
        images = doc.setdefault("images", [])
        images.append(image)
        textures = doc.setdefault("textures", [])
        textures.append({"sampler": sampler_index, "source": len(images) - 1, "name": vmap.name})
        texture_index = len(textures) - 1
        for material in targets:
            mat = doc["materials"][material]
            ext = mat.setdefault("extensions", {})
            volume = dict(ext.get(EXTENSION, {}))
            volume["thicknessFactor"] = plan.factor(material, vmap.reach)
            volume["thicknessTexture"] = {"index": texture_index, "texCoord": int(vmap.uv_set)}
            if vmap.attenuation_color is not None:
                volume["attenuationColor"] = [float(c) for c in vmap.attenuation_color]
                if vmap.attenuation_distance is not None:
                    volume["attenuationDistance"] = float(vmap.attenuation_distance)
                else:
                    volume.pop("attenuationDistance", None)  # default +inf: no attenuation
            ext[EXTENSION] = volume
            if transmission is not None:
                trans = dict(ext.get(TRANSMISSION, {}))
                trans["transmissionFactor"] = float(transmission)
                ext[TRANSMISSION] = trans
            report["materials"].append({"material": material, "name": mat.get("name"), "texture": texture_index,
                                        "thicknessFactor": volume["thicknessFactor"], "texCoord": int(vmap.uv_set),
                                        "node_scale": plan.scales[material],
                                        "transmits": any(k in ext for k in (TRANSMISSION, DIFFUSE_TRANSMISSION))})
    used = doc.setdefault("extensionsUsed", [])
    for name in [EXTENSION] + ([TRANSMISSION] if transmission is not None else []):
        if name not in used:
            used.append(name)
    out = GltfFile(path=gf.path, kind=gf.kind, doc=doc, bin=bin_chunk, extra_chunks=list(gf.extra_chunks))
    return out, side, report


def _append_view(doc: dict, bin_chunk: bytes | None, payload: bytes) -> tuple[bytes, int]:
    """Append ``payload`` to the GLB-stored buffer (4-byte aligned); returns the new BIN and view index."""
    buffers = doc.setdefault("buffers", [])
    if bin_chunk is None or not buffers or "uri" in buffers[0]:
        # the GLB-stored buffer must be buffers[0] without a uri (§4.4.3.3): insert one and renumber
        if buffers and "uri" not in buffers[0]:
            pass  # a declared but empty BIN buffer
        else:
            buffers.insert(0, {"byteLength": 0})
            for view in doc.get("bufferViews", []):
                view["buffer"] = int(view["buffer"]) + 1
        bin_chunk = b""
    offset = len(bin_chunk) + (-len(bin_chunk) % 4)
    new_bin = bin_chunk + b"\0" * (offset - len(bin_chunk)) + payload
    buffers[0]["byteLength"] = len(new_bin)
    views = doc.setdefault("bufferViews", [])
    views.append({"buffer": 0, "byteOffset": offset, "byteLength": len(payload)})
    return new_bin, len(views) - 1


def rebase_uris(doc: dict, source_dir: Path, out_dir: Path) -> None:
    """Point the relative URIs of buffers and images of a .gltf written into another folder at the
    original files (the copy references them instead of duplicating them)."""
    if source_dir.resolve() == out_dir.resolve():
        return
    for key in ("buffers", "images"):
        for item in doc.get(key, []) or []:
            uri = item.get("uri")
            if not isinstance(uri, str) or uri.startswith("data:") or "://" in uri:
                continue
            target = (source_dir / unquote(uri)).resolve()
            rel = os.path.relpath(target, out_dir.resolve())
            item["uri"] = quote(posixpath.join(*Path(rel).parts))


def gltf_output_bytes(gf: GltfFile) -> bytes:
    """The bytes of the file to write: a GLB, or the .gltf JSON text."""
    if gf.kind == "glb":
        return glb_bytes(gf.doc, gf.bin, gf.extra_chunks)
    return json.dumps(gf.doc, indent=2, ensure_ascii=False, allow_nan=False).encode("utf-8") + b"\n"


def check_gltf_output(source: str | os.PathLike, out: str | os.PathLike) -> Path:
    """The output must be a .glb/.gltf other than the input, of the same kind as the input."""
    out = Path(out)
    src = Path(source)
    if out.suffix.lower() not in GLTF_SUFFIXES:
        raise ThickbakeError("the glTF copy must be named .glb or .gltf", path=out, fix="e.g. --write-gltf out.glb")
    if src.suffix.lower() not in GLTF_SUFFIXES:
        raise ThickbakeError("--write-gltf needs a glTF input (.glb or .gltf)", path=src,
                             fix="export the asset as glTF, or leave --write-gltf out")
    if out.suffix.lower() != src.suffix.lower():
        raise ThickbakeError(f"the glTF copy of a {src.suffix} file must also be {src.suffix}", path=out,
                             fix=f"name it {out.stem}{src.suffix.lower()}")
    if out.exists() and src.exists() and out.resolve() == src.resolve():
        raise ThickbakeError("the glTF copy would overwrite its input", path=out, fix="give the copy another name")
    if out.is_dir():
        raise ThickbakeError("the glTF copy would overwrite a folder", path=out, fix="choose another name")
    return out


def volume_copy_files(source: str | os.PathLike, out: str | os.PathLike, plan: VolumePlan, maps: list[VolumeMap],
                      transmission: float | None = None) -> tuple[dict[Path, bytes], dict]:
    """The files of the glTF copy at ``out`` — {path: bytes}, side images first, the copy last — and the
    report of :func:`add_volume` with the file names.  Nothing is written (batch workers use this)."""
    out = Path(out)
    gf = read_gltf(source)
    names = None
    if gf.kind == "gltf":
        stem = out.name[: -len(out.suffix)]
        names = [f"{stem}.{m.name}.png" if len(maps) == 1 else f"{stem}.{m.name}.{i}.png" for i, m in enumerate(maps)]
        rebase_uris(gf.doc, gf.path.parent, out.parent)  # before adding: the new images live beside the output
    copy, side, report = add_volume(gf, plan, maps, transmission, names)
    files = {out.parent / name: data for name, data in side.items()}
    files[out] = gltf_output_bytes(copy)
    report["file"] = out.name
    report["images"] = sorted(side)
    return files, report


def write_volume_copy(source: str | os.PathLike, out: str | os.PathLike, plan: VolumePlan,
                      maps: list[VolumeMap], transmission: float | None = None) -> dict:
    """Read ``source``, add the maps and write the copy at ``out`` (side images first, atomically).

    Returns the report of :func:`add_volume` with the written file names.
    """
    from thickbake.maps.files import atomic_write_bytes

    files, report = volume_copy_files(source, out, plan, maps, transmission)
    for path, data in files.items():
        atomic_write_bytes(path, data)
    return report


__all__ = ["GltfFile", "VolumeMap", "VolumePlan", "read_gltf", "plan_volume", "add_volume", "glb_bytes",
           "gltf_output_bytes", "check_gltf_output", "write_volume_copy", "volume_copy_files", "mesh_instances", "uniform_scale"]
