"""Write the demo assets in ``samples/``: a wax candle stub and a small garden batch.

The scenario is invented for thickbake: a translucent wax candle with a shallow melt bowl and a thin
raised rim (``samples/candle.glb``), and for a batch run a thin leaf and a squashed pebble
(``samples/garden/leaf.obj``, ``samples/garden/pebble.obj``).  Every asset is a closed solid laid out
like a downloaded model: several UV islands, vertices split at seams and hard edges, +y up, metres.

Deterministic (no randomness) and idempotent: rerunning rewrites identical bytes, atomically.

Usage::

    python scripts/make_samples.py [--out samples]
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

import numpy as np
import trimesh

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # run from a checkout without installing

from thickbake.geometry import triangle_cross  # noqa: E402
from thickbake.maps.files import atomic_write_bytes  # noqa: E402
from thickbake.checks.surfaces import (  # noqa: E402
    Surface,
    arc_piece,
    assemble_mesh,
    glb_bytes,
    line_piece,
    obj_bytes,
    revolve,
    sphere_surface,
    uv_islands,
)

#: z-up (how the builders work) to y-up (how glTF and most OBJ files are authored): (x, y, z) -> (x, z, -y).
Z_UP_TO_Y_UP = np.array([[1.0, 0.0, 0.0], [0.0, 0.0, 1.0], [0.0, -1.0, 0.0]])


def _pbr(name, rgb, roughness):
    return trimesh.visual.material.PBRMaterial(
        name=name, baseColorFactor=[*rgb, 255], metallicFactor=0.0, roughnessFactor=roughness)


def candle_surface(radius=0.035, height=0.055, rim_width=0.0025, rim_rise=0.004, bowl_depth=0.007,
                   segments=64) -> Surface:
    """A candle stub: flat base, straight side, thin rim standing ``rim_rise`` above a spherical bowl.

    Profile, walked with the wax on the left: base disk out to the side, up the side, inwards across
    the rim top, down the rim's inner wall, then along a spherical bowl to the axis.  The bowl is the
    cap of the sphere through the inner rim foot ``(a, z1)`` and the bowl bottom ``(0, z1 - depth)``:
    radius ``(a^2 + depth^2) / (2 depth)``.  Hard edges at the base rim, the rim's two corners and the
    bowl edge.  Islands: base disk, side (two halves), and one top disk holding rim, wall and bowl.
    """
    a = radius - rim_width
    z1 = height - rim_rise
    rb = (a * a + bowl_depth**2) / (2.0 * bowl_depth)
    zc = z1 - bowl_depth + rb
    t_edge = math.atan2(z1 - zc, a)
    pieces = [
        line_piece((0.0, 0.0), (radius, 0.0), 6, "base"),
        line_piece((radius, 0.0), (radius, height), 16, "side", splits=2),
        line_piece((radius, height), (a, height), 1, "top"),
        line_piece((a, height), (a, z1), 2, "top"),
        arc_piece((0.0, zc), rb, t_edge, -math.pi / 2, 8, "top"),  # walked clockwise: normal faces up
    ]
    return revolve(pieces, segments)


def smooth_corner_normals(positions, faces, face_group):
    """Area-weighted vertex normals per smoothing group, as a modelling tool computes them.

    Parameters
    ----------
    positions : (m, 3) float64
    faces : (f, 3) int64
    face_group : (f,) int64
        Smoothing group of each face; normals are averaged only within a group (hard edges between).

    Returns
    -------
    (f, 3, 3) float64
        Unit normal at each face corner.
    """
    tri = positions[faces]
    area_normal = triangle_cross(tri)  # twice the area, outward
    groups = int(face_group.max()) + 1
    key = faces * groups + face_group[:, None]
    acc = np.zeros((len(positions) * groups, 3))
    np.add.at(acc, key.ravel(), np.repeat(area_normal, 3, axis=0))
    acc /= np.linalg.norm(acc, axis=1, keepdims=True).clip(1e-300)
    return acc[key]


def leaf_surface(length=0.09, width=0.04, thickness=0.0025, rings=10, segments=60) -> Surface:
    """A thin closed leaf: two sheets meeting at a sharp rim, thickest along the midrib.

    A polar grid on the unit disk (rho = k / rings, phi = 2 pi i / segments) is mapped to the planform
    ``x = L/2 rho cos(phi)``, ``y = W/2 rho sin(phi) (1 - 0.2 rho cos phi) (1 - (rho cos phi)^2)^0.35``
    (pointed tip and base, widest towards the stalk end).  Half-thickness
    ``T/2 sqrt(1 - rho^2) (0.55 + 0.45 exp(-(y / 0.06 W)^2))`` -- a midrib ridge on a thinner blade,
    closing to zero at the rim -- about a curved mid-surface ``z = 0.05 L (2x/L)^2 + 0.1 W (2y/W)^2``.
    Top and bottom sheets share the rim ring; each sheet is one UV island (planform projection) and
    one smoothing group.
    """
    n, k_max = segments, rings
    rho = np.arange(k_max + 1) / k_max
    phi = 2.0 * np.pi * np.arange(n) / n
    rr, pp = np.meshgrid(rho, phi, indexing="ij")  # (K + 1, n)
    cx = rr * np.cos(pp)
    x = 0.5 * length * cx
    y = 0.5 * width * rr * np.sin(pp) * (1.0 - 0.2 * cx) * np.clip(1.0 - cx**2, 0.0, None) ** 0.35
    mid = 0.05 * length * (2 * x / length) ** 2 + 0.1 * width * (2 * y / width) ** 2
    half = 0.5 * thickness * np.sqrt(np.clip(1.0 - rr**2, 0.0, None)) * (
        0.55 + 0.45 * np.exp(-((y / (0.06 * width)) ** 2)))
    # welded vertices: top centre, bottom centre, top rings 1..K-1, bottom rings 1..K-1, shared rim
    inner = slice(1, k_max)
    top = np.stack((x[inner], y[inner], mid[inner] + half[inner]), -1).reshape(-1, 3)
    bot = np.stack((x[inner], y[inner], mid[inner] - half[inner]), -1).reshape(-1, 3)
    rim = np.stack((x[k_max], y[k_max], mid[k_max]), -1)
    positions = np.concatenate(([[0.0, 0.0, mid[0, 0] + half[0, 0]]], [[0.0, 0.0, mid[0, 0] - half[0, 0]]],
                                top, bot, rim))
    base_top, base_bot, base_rim = 2, 2 + (k_max - 1) * n, 2 + 2 * (k_max - 1) * n
    cols = np.arange(n)
    idx = np.zeros((2, k_max + 1, n), dtype=np.int64)
    for sheet, centre, base in ((0, 0, base_top), (1, 1, base_bot)):  # two sheets
        idx[sheet, 0] = centre
        idx[sheet, 1:k_max] = base + (np.arange(k_max - 1)[:, None] * n + cols)
        idx[sheet, k_max] = base_rim + cols
    kk, ii = np.meshgrid(np.arange(k_max), cols, indexing="ij")
    kk, ii = kk.ravel(), ii.ravel()
    faces, groups = [], []
    for sheet in (0, 1):
        t = idx[sheet]
        a, b = t[kk, ii], t[kk, (ii + 1) % n]
        c, d = t[kk + 1, (ii + 1) % n], t[kk + 1, ii]
        f = np.concatenate((np.column_stack((a, d, c)), np.column_stack((a, c, b))[kk > 0]))
        if sheet == 1:
            f = f[:, ::-1]  # the underside faces down
        faces.append(f)
        groups.append(np.full(len(f), sheet))
    faces = np.concatenate(faces)
    groups = np.concatenate(groups)
    corner_uv = positions[faces][..., :2]  # planform projection; the assembler mirrors the underside
    return Surface(positions, faces, smooth_corner_normals(positions, faces, groups), corner_uv + 0.0,
                   groups.astype(np.int64), 0.0)


def pebble_surface(semi_axes=(0.032, 0.024, 0.013), segments=48) -> Surface:
    """A smooth squashed ellipsoid: the UV sphere scaled by its semi-axes (normals by the inverse)."""
    return sphere_surface(1.0, segments, label="pebble").transformed(np.diag(semi_axes))


def _check(mesh, name):
    """The same promises the analytic shapes make: closed, outward, split at seams, islands apart."""
    m = mesh.copy()
    m.merge_vertices(merge_tex=True, merge_norm=True)
    assert m.is_watertight and m.is_winding_consistent and m.volume > 0, name
    assert mesh.area_faces.min() > 0, name
    uv = mesh.visual.uv
    assert uv.min() >= 0 and uv.max() <= 1, name
    return int(uv_islands(mesh).max()) + 1


def build(out: Path) -> list[Path]:
    """Build and write every sample under ``out``; returns the paths written."""
    assets = [
        ("candle.glb", "candle stub, wax", candle_surface(), _pbr("wax", (236, 226, 204), 0.45)),
        ("garden/leaf.obj", "leaf", leaf_surface(), _pbr("leaf", (88, 140, 60), 0.6)),
        ("garden/pebble.obj", "pebble", pebble_surface(), _pbr("stone", (150, 146, 140), 0.9)),
    ]
    written = []
    notes = []
    for rel, what, surf, material in assets:  # three assets
        mesh = assemble_mesh(surf.transformed(Z_UP_TO_Y_UP), material=material)
        name = Path(rel).stem
        mesh.metadata["name"] = name
        islands = _check(mesh, rel)
        path = out / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        if path.suffix == ".glb":
            data = glb_bytes(mesh, name)
        else:
            data = obj_bytes(mesh, digits=7, comment=f"thickbake demo asset: {what} (metres, +y up)")
        written.append(atomic_write_bytes(path, data))
        ext = np.ptp(mesh.vertices, axis=0) * 1000
        notes.append(f"| `{rel}` | {what} | {len(mesh.faces)} | {len(mesh.vertices)} | {islands} | "
                     f"{ext[0]:.0f} x {ext[1]:.0f} x {ext[2]:.0f} |")
    readme = "\n".join([
        "# Demo assets",
        "",
        "Invented for thickbake and written by `python scripts/make_samples.py` (deterministic; do not edit).",
        "Closed solids in metres, +y up, UV islands packed in [0, 1]^2 with vertices split at seams and",
        "hard edges, as an exported model would be.",
        "",
        "| file | what | faces | vertices | UV islands | extent x, y, z (mm) |",
        "|---|---|---|---|---|---|",
        *notes,
        "",
        "* `candle.glb`: wax candle stub, 70 mm across, with a shallow melt bowl inside a 2.5 mm rim.",
        "* `garden/`: a batch folder -- a leaf about 2.5 mm thick at the midrib, closing to a sharp edge,",
        "  and a squashed pebble.",
        "",
    ])
    written.append(atomic_write_bytes(out / "README.md", readme.encode()))
    return written


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=Path(__file__).resolve().parents[1] / "samples",
                        help="output folder (default: the repository's samples/)")
    args = parser.parse_args(argv)
    for path in build(args.out):
        print(f"{path}  {path.stat().st_size / 1024:.0f} KiB")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
