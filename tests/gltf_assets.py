"""Valid glTF 2.0 test assets built from the package's analytic shapes, with things a write-back must keep.

trimesh's own exporter writes files the Khronos validator rejects (accessors sharing a buffer view
without byteStride), so the tests assemble their assets here, following the glTF 2.0 specification:
one buffer, one buffer view per accessor (with ``target``), POSITION min/max, unit normals, UVs with
the origin at the upper left (glTF §3.7.2.1: v is flipped from the shapes' OBJ convention).

:func:`rich_asset` has, besides the baked solid: a parent node with a scale, node and document
``extras``, a second mesh without UVs whose material uses KHR_materials_emissive_strength, and an
animation of an empty node — everything a write-back must leave untouched.
"""

from __future__ import annotations

import json
import struct

import numpy as np

from thickbake.maps.gltf_volume import glb_bytes


class _Builder:
    def __init__(self):
        self.blob = bytearray()
        self.views: list[dict] = []
        self.accessors: list[dict] = []

    def add(self, array: np.ndarray, component: int, kind: str, target: int | None, minmax: bool = False) -> int:
        self.blob += b"\0" * (-len(self.blob) % 4)
        data = np.ascontiguousarray(array).tobytes()
        view = {"buffer": 0, "byteOffset": len(self.blob), "byteLength": len(data)}
        if target is not None:
            view["target"] = target
        self.views.append(view)
        self.blob += data
        acc = {"bufferView": len(self.views) - 1, "componentType": component, "count": int(len(array)), "type": kind}
        if minmax:
            acc["min"] = [float(x) for x in np.min(array, axis=0).ravel()]
            acc["max"] = [float(x) for x in np.max(array, axis=0).ravel()]
        self.accessors.append(acc)
        return len(self.accessors) - 1

    def primitive(self, mesh, material: int, uv: bool = True, normals: bool = True) -> dict:
        vertices = np.asarray(mesh.vertices, np.float32)
        attrs = {"POSITION": self.add(vertices, 5126, "VEC3", 34962, minmax=True)}
        if normals:
            n = np.array(mesh.vertex_normals, np.float64)
            n /= np.linalg.norm(n, axis=1, keepdims=True)
            attrs["NORMAL"] = self.add(n.astype(np.float32), 5126, "VEC3", 34962)
        if uv:
            tex = np.asarray(mesh.visual.uv, np.float64).copy()
            tex[:, 1] = 1.0 - tex[:, 1]  # glTF: (0, 0) is the upper-left corner of the image
            attrs["TEXCOORD_0"] = self.add(tex.astype(np.float32), 5126, "VEC2", 34962)
        indices = self.add(np.asarray(mesh.faces, np.uint32).ravel(), 5125, "SCALAR", 34963)
        return {"attributes": attrs, "indices": indices, "material": material, "mode": 4}


def _box_mesh():
    import trimesh

    return trimesh.creation.box(extents=(2.0, 2.0, 2.0))


def rich_asset(solid_mesh, scale: float = 0.01, rotation=(0.0, 0.0, 0.0, 1.0)) -> tuple[dict, bytes]:
    """(glTF JSON document, BIN bytes): ``solid_mesh`` in node "solid" under a node of uniform ``scale``."""
    b = _Builder()
    solid = b.primitive(solid_mesh, material=0)
    plinth = b.primitive(_box_mesh(), material=1, uv=False, normals=False)
    times = b.add(np.array([0.0, 1.0], np.float32), 5126, "SCALAR", None, minmax=True)
    turns = b.add(np.array([[0, 0, 0, 1], [0, 0.70710677, 0, 0.70710677]], np.float32), 5126, "VEC4", None)
    doc = {
        "asset": {"version": "2.0", "generator": "thickbake tests", "copyright": "test asset"},
        "extensionsUsed": ["KHR_materials_emissive_strength"],
        "extras": {"scenario": "a wax figure on a stone plinth"},
        "scene": 0,
        "scenes": [{"name": "stage", "nodes": [0]}],
        "nodes": [
            {"name": "root", "scale": [scale] * 3, "rotation": list(rotation), "children": [1, 2, 3]},
            {"name": "solid", "mesh": 0, "extras": {"note": "keep me"}},
            {"name": "plinth", "mesh": 1, "translation": [40.0, 0.0, 0.0]},
            {"name": "spinner"},
        ],
        "meshes": [{"name": "solid", "primitives": [solid]}, {"name": "plinth", "primitives": [plinth]}],
        "materials": [
            {"name": "wax", "pbrMetallicRoughness": {"baseColorFactor": [0.9, 0.8, 0.6, 1.0], "metallicFactor": 0.0,
                                                     "roughnessFactor": 0.6}},
            {"name": "stone", "emissiveFactor": [1.0, 0.5, 0.25],
             "extensions": {"KHR_materials_emissive_strength": {"emissiveStrength": 2.0}},
             "extras": {"quarry": "north"}},
        ],
        "animations": [{"name": "spin", "samplers": [{"input": times, "output": turns, "interpolation": "LINEAR"}],
                        "channels": [{"sampler": 0, "target": {"node": 3, "path": "rotation"}}]}],
        "accessors": b.accessors,
        "bufferViews": b.views,
        "buffers": [{"byteLength": len(b.blob)}],
    }
    blob = bytes(b.blob) + b"\0" * (-len(b.blob) % 4)
    return doc, blob


def write_glb(path, doc: dict, blob: bytes) -> None:
    path.write_bytes(glb_bytes(doc, blob))


def write_gltf(path, doc: dict, blob: bytes, bin_name: str = "asset.bin") -> None:
    doc = json.loads(json.dumps(doc))
    doc["buffers"][0]["uri"] = bin_name
    (path.parent / bin_name).write_bytes(blob)
    path.write_text(json.dumps(doc, indent=1))


def glb_parts(data: bytes) -> tuple[dict, bytes]:
    """(JSON, BIN) of GLB bytes, read directly from the chunk layout (glTF 2.0 §4.4)."""
    magic, version, length = struct.unpack_from("<III", data, 0)
    assert magic == 0x46546C67 and version == 2 and length == len(data)
    n, kind = struct.unpack_from("<II", data, 12)
    assert kind == 0x4E4F534A
    doc = json.loads(data[20:20 + n])
    pos = 20 + n
    m, kind = struct.unpack_from("<II", data, pos)
    assert kind == 0x004E4942
    return doc, data[pos + 8:pos + 8 + m]


__all__ = ["rich_asset", "write_glb", "write_gltf", "glb_parts"]
