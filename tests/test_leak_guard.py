"""The fast Embree scene with its leak guard gives the robust scene's answers, ray for ray and map for map.

Embree's non-robust mode lets rays aimed within round-off of a shared edge or vertex slip through a
closed surface (Embree API documentation, rtcSetSceneFlags: RTC_SCENE_FLAG_ROBUST "avoid[s]
artifacts caused by rays shooting through edges of neighboring primitives").  The meshes here are
built so that rays hit exactly at edges and vertices; each test first shows that the fast scene
alone does leak there, so it can fail, then requires bit-identical output from the guarded engine and
the robust-only engine.
"""

import numpy as np
import pytest
import trimesh
from scipy.spatial.transform import Rotation
from trimesh.visual import TextureVisuals

import thickbake
from thickbake.pipeline.load import load_asset
from thickbake.pipeline.trace import EmbreeEngine, make_engine

pytest.importorskip("embreex")


def engines(vertices, faces, closed=True):
    return {mode: EmbreeEngine(vertices, faces, closed=closed, mode=mode) for mode in ("robust", "guarded", "fast")}


def test_rays_at_edges_and_vertices_of_a_closed_polyhedron():
    mesh = trimesh.creation.icosphere(subdivisions=4)
    e = engines(mesh.vertices, mesh.faces)
    v = mesh.vertices.astype(np.float32)
    targets = np.concatenate([v, (v[mesh.edges_unique[:, 0]] + v[mesh.edges_unique[:, 1]]) / 2])
    rng = np.random.default_rng(3)
    origins = (rng.normal(size=(len(targets), 3)) * 0.2).astype(np.float32)       # inside the unit sphere
    directions = targets - origins
    directions = (directions / np.linalg.norm(directions, axis=1, keepdims=True)).astype(np.float32)
    fast = e["fast"].first_hit_faces(origins, directions, 10.0)
    robust = e["robust"].first_hit_faces(origins, directions, 10.0)
    guarded = e["guarded"].first_hit_faces(origins, directions, 10.0)
    assert (~fast[1]).sum() > 100                       # the fast scene alone leaks through the closed mesh
    assert (~fast[1]).sum() > 10 * (~robust[1]).sum()   # (the robust scene leaks a few exactly vertex-aimed rays too)
    for a, b in zip(guarded, robust):
        assert np.array_equal(a, b)
    assert e["guarded"].rays_retraced >= (~fast[1]).sum()
    # ordinary rays from inside: identical as well, and only a small share re-traced
    origins = (rng.normal(size=(200_000, 3)) * 0.15).astype(np.float32)
    directions = rng.normal(size=(200_000, 3)).astype(np.float32)
    directions /= np.linalg.norm(directions, axis=1, keepdims=True)
    before = e["guarded"].rays_retraced
    for a, b in zip(e["guarded"].first_hit_faces(origins, directions, 10.0),
                    e["robust"].first_hit_faces(origins, directions, 10.0)):
        assert np.array_equal(a, b)
    assert e["guarded"].rays_retraced - before < 0.05 * len(origins)


def vertex_slab(size: int, height: float = 0.25, seed: int = 0) -> trimesh.Trimesh:
    """A closed slab whose UV-mapped top is two triangles and whose bumpy bottom has a vertex exactly
    under every texel centre of a ``size``² map, tilted so that the straight-in rays (``cone=0``) aim
    at those vertices to within float32 round-off."""
    top = np.array([[0, 0, height], [1, 0, height], [1, 1, height], [0, 1, height]], float)
    g = np.concatenate([[0.0], (np.arange(size) + 0.5) / size, [1.0]])
    x, y = np.meshgrid(g, g, indexing="ij")
    bump = np.random.default_rng(seed).uniform(0, 0.05, x.shape)
    bump[[0, -1], :] = bump[:, [0, -1]] = 0.0          # a straight border keeps the side fans flat and unfolded
    bottom = np.stack([x.ravel(), y.ravel(), bump.ravel()], 1)
    n = len(g)
    idx = np.arange(n * n).reshape(n, n) + 4
    a, b, c, d = idx[:-1, :-1].ravel(), idx[1:, :-1].ravel(), idx[1:, 1:].ravel(), idx[:-1, 1:].ravel()
    faces = [np.array([[0, 1, 2], [0, 2, 3]]), np.stack([a, c, b], 1), np.stack([a, d, c], 1)]
    corner = 4 + n * n                                   # the top corners again, without UVs, for the sides
    for (t0, t1), edge in zip([(0, 1), (1, 2), (2, 3), (3, 0)], [idx[:, 0], idx[-1, :], idx[::-1, -1], idx[0, ::-1]]):
        faces += [[[edge[k], edge[k + 1], corner + t0]] for k in range(len(edge) - 1)]
        faces.append([[edge[-1], corner + t1, corner + t0]])
    faces = np.concatenate(faces)
    vertices = Rotation.from_rotvec([0.3, -0.5, 0.2]).apply(np.concatenate([top, bottom, top]))
    uv = np.concatenate([top[:, :2], np.full((len(bottom) + 4, 2), -5.0)])    # only the top is in the map
    mesh = trimesh.Trimesh(vertices, faces, visual=TextureVisuals(uv=uv), process=False)
    if mesh.volume < 0:
        mesh = trimesh.Trimesh(vertices, faces[:, ::-1], visual=TextureVisuals(uv=uv), process=False)
    return mesh


def test_bake_is_identical_to_a_robust_bake_where_the_fast_scene_leaks():
    asset = load_asset(vertex_slab(64))
    assert asset.report.watertight
    e = engines(asset.trace_vertices, asset.trace_faces, closed=True)
    maps = {mode: thickbake.bake(asset, size=64, cone=0, engine=engine) for mode, engine in e.items()}
    # the fast scene alone lets rays escape through the slab's bottom (they read the full reach)
    assert maps["fast"].info["miss_fraction"] > 0 and not np.array_equal(maps["fast"].values, maps["robust"].values)
    assert maps["fast"].info["miss_fraction"] > 10 * maps["robust"].info["miss_fraction"]   # robust: a rare vertex
    assert np.array_equal(maps["guarded"].values, maps["robust"].values)
    assert np.array_equal(maps["guarded"].stderr, maps["robust"].stderr)
    assert maps["guarded"].info["rays_retraced"] > 0
    # a cone of directions through the same mesh: identical too
    a = thickbake.bake(asset, size=32, rays=16, engine=e["guarded"])
    b = thickbake.bake(asset, size=32, rays=16, engine=e["robust"])
    assert np.array_equal(a.values, b.values)


def test_bake_uses_the_guarded_engine_and_says_so(tmp_path):
    asset = load_asset(vertex_slab(8))
    engine = make_engine(asset.trace_vertices, asset.trace_faces, closed=True)
    assert engine.mode == "guarded" and engine.closed
    result = thickbake.bake(asset, size=8, cone=0)
    assert "re-traced" in result.info["engine"] and result.info["rays_retraced"] >= 0
