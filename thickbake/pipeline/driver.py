"""The bake driver: load → rasterise texels → directions → trace → measure → encode/pad → write.

:func:`bake` is the library entry point; the command line and the batch runner are thin layers over
it.  The map is cut into square tiles; a thread pool runs whole tiles (rasterise, generate rays,
trace, reduce) so Python's share of the work overlaps the ray engine's, which releases the GIL.  Each
tile holds at most ``chunk_rays`` rays at a time, so memory does not grow with the map.  Every random
number derives from (seed, sample key), so the map does not depend on tiling or thread count.
"""

from __future__ import annotations

import math
import os
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from thickbake.version import __version__
from thickbake.pipeline.directions import ray_directions, rays_per_sample as traced_rays, replicate_count, sample_keys, variates
from thickbake.maps.encode import normalise, quantise
from thickbake.constants import ESCAPE_MARGIN
from thickbake.errors import ThickbakeError
from thickbake.measures import measure_named
from thickbake.pipeline.measures import (MODERATION_BLOCK, Moments, block_labels, moderated_stderr_map, moderated_variance,
                                         prior_dof, texel_reduce)
from thickbake.pipeline.load import Asset, load_asset
from thickbake.pipeline.finish import fit_reach, medium_record, medium_scale
from thickbake.maps.files import check_output_path, write_map
from thickbake.maps.padding import pad_map
from thickbake.maps.sidecar import build_sidecar, with_error_map, with_exr_sample_type, with_unprojected_mask
from thickbake.pipeline.trace import RayEngine
from thickbake.settings import BakeSettings, RunOptions, check_memory, split_options
from thickbake.pipeline.blockers import build_engines
from thickbake.pipeline.groups import MapGroup, MapKey, local_units, map_groups
from thickbake.pipeline.origins import inward_origins
from thickbake.pipeline.transfer import Transfer
from thickbake.pipeline.texels import morton_order, pixel_triangles, place_samples, rasterise_tile, tile_buckets

#: First batch of rays per sample in adaptive mode: two points per replicate (R = 4), the fewest that
#: still give every replicate a stratified pair.
ADAPTIVE_FIRST_BATCH = 8
#: Side, in texels, of the aligned blocks whose samples lend each other strength when adaptive
#: sampling decides whether a sample needs more rays (:func:`thickbake.pipeline.measures.moderated_variance`).
#: The map moderation's block (:data:`thickbake.pipeline.measures.MODERATION_BLOCK`): blocks are aligned
#: to multiples of 4 texels and tiles are aligned powers of two ≥ 16, so a block never straddles tiles
#: and the map does not depend on the tiling.
ADAPTIVE_POOL_BLOCK = MODERATION_BLOCK
#: Rays per tile an adaptive bake cuts its tiles for, whatever the run's ``chunk_rays``: its stopping
#: rule estimates one prior d₀ per tile (:func:`_needs_more`), so there, unlike in a fixed bake, the
#: tile shapes the map, and run options must not.  The ray batches inside a tile still follow
#: ``chunk_rays``, which keeps bounding the memory of the rays in flight.
ADAPTIVE_TILE_RAYS = RunOptions().chunk_rays
#: Rays generated and traced per engine call.  Small enough that the direction arrays of one call
#: (~12 bytes a ray each) stay in the core's L2 cache while numpy builds them, large enough that the
#: per-call overhead is negligible.
RAYS_PER_CALL = 1 << 16


@dataclass
class BakeResult:
    """A baked map in memory.

    Attributes
    ----------
    values : (h, w) float32
        Measure per texel (scene units for thickness, unitless otherwise), unpadded; 0 where not covered.
    covered : (h, w) bool
        Texels that received surface samples.
    stderr : (h, w) float32
        Standard error of each texel's mean, measure units: its replicate standard error moderated
        with its neighbours' (:func:`thickbake.pipeline.measures.moderated_stderr_map`).
    area : (h, w) float32
        World-space surface area each texel represents, scene units² (0 on border texels).
    rays : (h, w) int32
        Rays traced per texel.
    settings : BakeSettings
        The resolved settings (reach, bias, pad filled in).
    info : dict
        Figures for the sidecar (coverage, stats, timings, mesh report, input file).
    run : RunOptions
        How it ran (threads filled in).
    key : MapKey or None
        Which (material, UV set, UDIM tile) of the asset the map holds.
    unprojected : (h, w) bool or None
        Bakes from a source solid only: texels of the map's UV layout none of whose samples found a
        source point within the search distance or the cage (left to padding, never given a value).
    stderr_dof : (h, w) float32 or None
        Degrees of freedom of each texel's ``stderr`` (0 where there is none): a band at level p is
        ±t_{(1+p)/2, dof}·stderr (:func:`thickbake.pipeline.measures.dof_coverage_factor`).
    """

    values: np.ndarray
    covered: np.ndarray
    stderr: np.ndarray
    area: np.ndarray
    rays: np.ndarray
    settings: BakeSettings
    info: dict = field(default_factory=dict)
    run: RunOptions = field(default_factory=RunOptions)
    key: MapKey | None = None
    unprojected: np.ndarray | None = None
    stderr_dof: np.ndarray | None = None

    @property
    def world_per_local(self) -> float | None:
        """Scene units per unit of the mesh's own coordinates (the node scale), None when the map's
        faces sit under different or uneven scales."""
        return (self.info.get("local_units") or {}).get("world_per_local", 1.0)

    @property
    def local_thickness_factor(self) -> float | None:
        """KHR_materials_volume ``thicknessFactor`` for this map as a non-inverted thickness PNG: the
        reach in the mesh's own units (glTF thickness is in the mesh's coordinate space), or None."""
        scale = self.world_per_local
        if self.settings.measure != "thickness" or self.settings.invert or not scale:
            return None
        return float(self.settings.reach) / scale

    def padded(self) -> np.ndarray:
        """(h, w) float32 values with seam padding applied (covered texels unchanged)."""
        return pad_map(self.values, self.covered, self.settings.pad)[0]

    def stored(self) -> np.ndarray:
        """(h, w) float64 padded values normalised to [0, 1] as stored in an integer image."""
        s = self.settings
        return normalise(self.padded(), s.measure, s.reach, s.invert)

    def codes(self, bits: int | None = None) -> np.ndarray:
        """(h, w) uint16/uint8 image codes of the measure (the thickness codes, also with a medium)."""
        return quantise(self.stored(), bits or self.settings.bits)

    def rgb(self) -> np.ndarray:
        """(h, w, 3) float64 RGB transmittance exp(−σtr · d) of a medium bake (padded)."""
        from thickbake.media import transmittance

        medium = self.info["medium"]
        return transmittance(self.padded(), medium["sigma_tr_per_mm"], medium["mm_per_unit"])

    def sidecar(self, map_path: str | os.PathLike) -> dict:
        """The sidecar describing the map written at ``map_path`` (PNG codes or float TIFF)."""
        s = self.settings
        return build_sidecar(Path(map_path).name, self.info, s.measure, s.reach, s.invert, s.bits, __version__)

    def image(self, suffix: str) -> np.ndarray:
        """The array a map file of this suffix holds: (h, w) uint16/uint8 codes for ``.png``, float32
        measure for ``.tif``/``.tiff``/``.exr`` (all padded); with a medium (h, w, 3) RGB
        transmittance, as codes for ``.png`` and float32 for ``.exr``."""
        suffix = suffix.lower()
        if "medium" in self.info:
            if suffix in (".tif", ".tiff"):
                raise ThickbakeError("an RGB transmittance map cannot be a float TIFF", path=self.info["input"]["file"],
                                     fix="write it as .png or .exr")
            rgb = self.rgb()
            return quantise(rgb, self.settings.bits) if suffix == ".png" else rgb.astype(np.float32)
        return self.codes() if suffix == ".png" else self.padded().astype(np.float32)

    def encode(self, map_name: str, image: np.ndarray | None = None, exr_type: str = "float") -> tuple[bytes, dict]:
        """The map file's bytes and its sidecar for a map called ``map_name`` (suffix picks the format).

        ``image`` is :meth:`image` for that suffix when the caller already has it (padding and
        quantising a large map is not free).
        """
        from thickbake.maps.files import image_bytes

        suffix = Path(map_name).suffix.lower()
        if image is None:
            image = self.image(suffix)
        sidecar = self.sidecar(map_name)
        if suffix == ".exr":
            from thickbake.maps.exr import exr_bytes, sidecar_attributes

            sidecar = with_exr_sample_type(sidecar, exr_type)
            return exr_bytes(image, sidecar_attributes(sidecar), exr_type), sidecar
        return image_bytes(image, suffix), sidecar

    def write(self, map_path: str | os.PathLike, error_out: str | os.PathLike | None = None,
              exr_type: str = "float", unprojected_out: str | os.PathLike | None = None) -> Path:
        """Write the map (PNG codes or float32 TIFF of the measure) and its sidecar, atomically.

        ``unprojected_out`` (bakes from a source solid) also writes :meth:`unprojected_mask` as an
        8-bit PNG.
        """
        path = check_output_path(map_path, error_out)
        extra = {}
        if error_out is not None:
            extra[Path(error_out)] = self.stderr
        if unprojected_out is not None:
            extra[Path(unprojected_out)] = self.unprojected_mask()
        data, sidecar = self.encode(path.name, exr_type=exr_type)
        if error_out is not None:
            sidecar = with_error_map(sidecar, error_out)
        if unprojected_out is not None:
            sidecar = with_unprojected_mask(sidecar, unprojected_out)
        write_map(path, data, sidecar, extra)
        return path

    def unprojected_mask(self) -> np.ndarray:
        """(h, w) uint8: 255 on texels of the UV layout that found no source point, else 0."""
        if self.unprojected is None:
            raise ValueError("only a bake from a source solid (source=...) has unprojected texels")
        return np.where(self.unprojected, 255, 0).astype(np.uint8)


@dataclass
class _Context:
    """What every tile of one bake shares: inputs, resolved options, and the maps tiles write into."""

    asset: Asset
    settings: BakeSettings
    run: RunOptions
    engines: list
    engine_of_face: np.ndarray
    tri_px: np.ndarray
    jacobian: np.ndarray
    tile: int
    rays_per_sample: int
    values: np.ndarray
    stderr: np.ndarray
    area: np.ndarray
    rays: np.ndarray
    claims: np.ndarray
    key: MapKey
    faces: np.ndarray
    escape_distance: float
    transfer: Transfer | None = None
    unprojected: np.ndarray | None = None
    offset: np.ndarray | None = None


#: Figures each tile reports, summed over the bake.
_TALLY_KEYS = ("rays", "misses", "escapes", "overlapped", "samples", "rays_cap", "origins_moved", "origins_outside",
               "unprojected_samples")


def bake(mesh, settings: BakeSettings | None = None, run: RunOptions | None = None, *,
         progress: Callable[[float, int], None] | None = None, engine: RayEngine | None = None,
         source=None, cage=None, search_distance: float | None = None, **options) -> BakeResult:
    """Bake a thickness-type map of a UV-mapped mesh whose faces make one map, measured in the mesh
    itself or in a source solid.

    An asset with several materials or UDIM tiles makes several maps: use :func:`bake_maps`.

    Parameters
    ----------
    mesh : str, os.PathLike, trimesh.Trimesh, trimesh.Scene or Asset
        The asset (a file is loaded with :func:`thickbake.pipeline.load.load_asset`).
    settings : BakeSettings, optional
        What the map holds; defaults to ``BakeSettings()``.
    run : RunOptions, optional
        How the bake runs (threads, work-item size, texel order); defaults to ``RunOptions()``.
    progress : callable(fraction_done, rays_traced), optional
        Called from worker threads after each tile.
    engine : RayEngine, optional
        A ray engine over the traced mesh (see :mod:`thickbake.pipeline.trace`): the asset's, or the
        source's in a bake from a source solid; built if omitted.
    source : path, trimesh object, Asset, SourceSolid or list of paths/objects, optional
        Measure in this solid (which needs no UVs) and write to ``mesh``'s UVs
        (:mod:`thickbake.pipeline.transfer`).  Reach, bias and attenuation distance then default
        relative to the source's bounding box, the solid measured; ``blockers`` does not apply.
    cage : path, trimesh object or Asset, optional
        With ``source``: a mesh with the target's triangles whose matching points set each sample's
        search direction and distance.
    search_distance : float, optional
        With ``source`` and no cage: how far to search along the target's normal on either side, scene
        units (default 5% of the target's bounding-box diagonal).
    **options
        Fields of either object (``size=512``, ``threads=2``), overriding ``settings`` and ``run``.

    Returns
    -------
    BakeResult

    Raises
    ------
    ThickbakeError
        The asset makes more than one map (the message names them).

    Examples
    --------
    >>> import thickbake
    >>> from thickbake.checks import shapes
    >>> result = thickbake.bake(shapes.sphere(radius=1.0).mesh, size=64, rays=16, cone=0)
    >>> bool(abs(result.values[result.covered].mean() - 2.0) < 0.01)
    True
    """
    asset = mesh if isinstance(mesh, Asset) else load_asset(mesh, argument="mesh")
    settings, run = _with_options(settings, run, options)
    groups, _ = map_groups(asset, settings.uv_set)
    if len(groups) > 1:
        names = ", ".join(_key_text(g.key) for g in groups[:6]) + (" ..." if len(groups) > 6 else "")
        raise ThickbakeError(f"the asset makes {len(groups)} maps ({names}), not one", path=asset.path or asset.name,
                             fix="bake it with thickbake.bake_maps (the command line writes one file per map)")
    return bake_maps(asset, settings, run, progress=progress, engine=engine, source=source, cage=cage,
                     search_distance=search_distance)[0]


def bake_maps(mesh, settings: BakeSettings | None = None, run: RunOptions | None = None, *,
              progress: Callable[[float, int], None] | None = None, engine: RayEngine | None = None,
              source=None, cage=None, search_distance: float | None = None, **options) -> list[BakeResult]:
    """Bake one map per (material, UV set, UDIM tile) of a UV-mapped mesh.

    Each map rasterises only its own faces (UVs shifted into its tile's unit square), so UV overlap
    is judged within a map; every map traces against the blockers ``settings.blockers`` chooses
    (all parts by default).

    Parameters
    ----------
    mesh, settings, run, progress, engine, source, cage, search_distance, **options
        As :func:`bake`; ``engine`` is used for ``blockers = "all"`` or over the source.

    Returns
    -------
    list of BakeResult
        In material order (faces without material last), then tile; ``result.key`` says which.

    Examples
    --------
    >>> import thickbake
    >>> from thickbake.checks import shapes
    >>> maps = thickbake.bake_maps(shapes.sphere(radius=1.0).mesh, size=32, rays=4)
    >>> [(m.key.material, m.key.uv_set, m.key.tile) for m in maps]
    [('sphere', 0, None)]
    """
    start = time.perf_counter()
    settings, run = _with_options(settings, run, options)
    asset = mesh if isinstance(mesh, Asset) else load_asset(mesh, argument="mesh")
    fit = settings.reach == "fit"
    mm_per_unit = medium_scale(settings, asset.path)  # a missing unit is refused before any tracing
    transfer = None
    if source is not None:
        from thickbake.pipeline.transfer import prepare_transfer

        transfer = prepare_transfer(asset, source, cage, search_distance, engine)
    elif cage is not None or search_distance is not None:
        raise ThickbakeError("a cage or a search distance needs a source solid to search for",
                             fix="give the source mesh too (source=..., or --from SOURCE)")
    s = settings.resolve(asset.diagonal if transfer is None else transfer.solid.diagonal)
    r = run.resolve()
    groups, group_warnings = map_groups(asset, s.uv_set)
    from thickbake.pipeline.trace import closed_surface, make_engine

    def make(vertices, faces):
        # a closed (sub)mesh lets the leak guard re-trace rays that escape it
        return make_engine(vertices, faces, closed=closed_surface(faces))

    if transfer is None:
        engines, engine_of_face = build_engines(asset, s.blockers, make, engine)
    else:  # every target face measures in the source
        engines, engine_of_face = [transfer.engine], np.zeros(len(asset.trace_faces), np.int64)
    setup = time.perf_counter() - start
    weights = np.array([float(g.faces.sum()) for g in groups])
    weights = weights / weights.sum()
    done_before = np.r_[0.0, np.cumsum(weights)]
    traced_before = [0]
    results = []
    for i, group in enumerate(groups):
        def map_progress(fraction, rays, i=i):
            if progress is not None:
                progress(float(done_before[i] + weights[i] * fraction), traced_before[0] + rays)
        result = _bake_map(asset, s, r, group, engines, engine_of_face, map_progress, setup if i == 0 else 0.0,
                           fit, mm_per_unit, transfer)
        traced_before[0] += result.info["rays_traced"]
        if group_warnings:
            result.info["warnings"] = list(group_warnings) + result.info["warnings"]
        results.append(result)
    return results


def _key_text(key: MapKey) -> str:
    return (f"material {key.material_label}" + (f" tile {key.tile}" if key.tile is not None else "")
            + (f" UV set {key.uv_set}" if key.uv_set else ""))


def _bake_map(asset: Asset, s: BakeSettings, r: RunOptions, group: MapGroup, engines, engine_of_face, progress,
              setup_seconds: float, fit: bool, mm_per_unit: float | None, transfer: Transfer | None = None) -> BakeResult:
    """Bake the map of one group of faces (all of the asset's engines shared); ``fit`` fits this
    map's own reach (so each map of an asset uses its full code range)."""
    start = time.perf_counter() - setup_seconds
    retraced_before = sum(getattr(e, "rays_retraced", 0) for e in engines)
    ctx, tiles, starts, members = _prepare(asset, s, r, group, engines, engine_of_face, transfer)
    setup_seconds = time.perf_counter() - start
    totals = _run_tiles(ctx, tiles, starts, members, progress)
    trace_seconds = time.perf_counter() - start - setup_seconds

    covered = ctx.claims > 0
    if not covered.any() and transfer is not None and ctx.unprojected.any():
        raise ThickbakeError(f"no texel of the map ({_key_text(group.key)}) found a point of the source",
                             path=asset.path, fix="check the source lines up with the target, or raise the search distance")
    if not covered.any():
        raise ThickbakeError(f"no texel of the map ({_key_text(group.key)}) is covered by the UV layout",
                             path=asset.path, fix="check the UVs lie inside the 0–1 square or in UDIM tiles")
    timing = {"setup_seconds": round(setup_seconds, 3), "trace_seconds": round(trace_seconds, 3)}
    own_dof = 0 if ctx.rays_per_sample < 2 else replicate_count(ctx.rays_per_sample) - 1
    # adaptive maps: a texel borrows only from neighbours that traced as many rays; every map: the
    # moderation works on variance × rays, so a border texel holding fewer samples (--supersample)
    # borrows its neighbours' per-ray variance, not the smaller variance of their larger means
    strata = ctx.rays if s.target_error is not None else None
    ctx.stderr, stderr_dof, map_d0 = moderated_stderr_map(ctx.stderr, covered, own_dof, strata=strata,
                                                             count=ctx.rays)
    info = _bake_info(ctx, covered, totals, time.perf_counter() - start, timing)
    info["rays_retraced"] = int(sum(getattr(e, "rays_retraced", 0) for e in engines) - retraced_before)
    info["stderr_dof"] = {"own": own_dof, "prior": None if math.isinf(map_d0) else round(float(map_d0), 3),
                          "median": float(np.median(stderr_dof[covered]))}
    if fit:
        reach, info["reach_fit"] = fit_reach(ctx.values, covered, s.reach)
        s = s.replace(reach=reach)
        info.update(reach=reach, settings=s.to_dict(), settings_hash=s.content_hash())
    if mm_per_unit is not None:
        info["medium"] = medium_record(s, mm_per_unit)
    return BakeResult(values=ctx.values, covered=covered, stderr=ctx.stderr, area=ctx.area, rays=ctx.rays,
                      settings=s, info=info, run=r, key=group.key, unprojected=ctx.unprojected,
                      stderr_dof=stderr_dof)


def _with_options(settings: BakeSettings | None, run: RunOptions | None,
                  options: dict) -> tuple[BakeSettings, RunOptions]:
    """Apply keyword options of either kind to the settings and run options (defaults when None)."""
    content, run_changes = split_options(options, where="bake options")
    if settings is None:
        settings = BakeSettings.from_mapping(content, where="bake options") if content else BakeSettings()
    elif content:
        settings = settings.replace(**content)
    if run is None:
        run = RunOptions(**run_changes)
    elif run_changes:
        run = run.replace(**run_changes)
    check_memory(settings, run)
    return settings, run


def _prepare(asset: Asset, s: BakeSettings, r: RunOptions, group: MapGroup, engines, engine_of_face,
             transfer: Transfer | None = None):
    """The shared context of one map and its tiles: (context, tiles, starts, members) of :func:`tile_buckets`."""
    width, height = s.size
    tri_px, valid, jacobian, _ = pixel_triangles(asset.triangles, group.triangle_uv, group.faces, width, height)
    rays_per_sample = 1 if s.cone == 0 else traced_rays(s.rays)
    tile_rays = ADAPTIVE_TILE_RAYS if s.target_error is not None else r.chunk_rays
    tile = _tile_side(tile_rays, rays_per_sample, s.supersample, width, height)
    tiles, starts, members = tile_buckets(tri_px, valid, width, height, tile)
    ctx = _Context(
        asset=asset, settings=s, run=r, engines=engines, engine_of_face=engine_of_face, tri_px=tri_px,
        jacobian=jacobian, tile=tile, rays_per_sample=rays_per_sample,
        values=np.zeros((height, width), np.float32), stderr=np.zeros((height, width), np.float32),
        area=np.zeros((height, width), np.float32), rays=np.zeros((height, width), np.int32),
        claims=np.zeros((height, width), np.uint16), key=group.key, faces=group.faces,
        # rays from inside a closed solid meet a wall within the bounding-box diagonal (plus the
        # start offset); one that travels further has left the mesh
        escape_distance=(asset.diagonal if transfer is None else transfer.solid.diagonal) * (1.0 + ESCAPE_MARGIN)
        + 2.0 * s.bias,
        transfer=transfer,
    )
    if transfer is not None:
        ctx.unprojected = np.zeros((height, width), bool)
        ctx.offset = np.zeros((height, width), np.float32)
    return ctx, tiles, starts, members


def _run_tiles(ctx: _Context, tiles: np.ndarray, starts: np.ndarray, members: np.ndarray, progress) -> dict:
    """Bake every tile, in a thread pool unless one thread or one tile; returns the summed tallies."""
    totals = dict.fromkeys(_TALLY_KEYS, 0)
    lock = threading.Lock()
    done = [0]

    def run(i: int):
        out = _bake_tile(ctx, int(tiles[i, 0]), int(tiles[i, 1]), members[starts[i]:starts[i + 1]])
        with lock:
            for key, value in out.items():
                totals[key] += value
            done[0] += 1
            if progress is not None:
                progress(done[0] / len(tiles), totals["rays"])

    if ctx.run.threads == 1 or len(tiles) <= 1:
        for i in range(len(tiles)):
            run(i)
        return totals
    pool = ThreadPoolExecutor(max_workers=ctx.run.threads, thread_name_prefix="thickbake")
    try:
        for future in [pool.submit(run, i) for i in range(len(tiles))]:
            future.result()
    except BaseException:
        # Ctrl-C or a failing tile: drop the tiles not started yet instead of finishing them all
        pool.shutdown(wait=True, cancel_futures=True)
        raise
    pool.shutdown(wait=True)
    return totals


def _bake_info(ctx: _Context, covered: np.ndarray, totals: dict, seconds: float, timing: dict) -> dict:
    """The figures of a finished bake that the sidecar records (see :mod:`thickbake.maps.sidecar`)."""
    s, asset = ctx.settings, ctx.asset
    width, height = s.size
    n_covered = int(covered.sum())
    escape_fraction = totals["escapes"] / max(totals["rays"], 1)
    warnings = bake_warnings(escape_fraction, totals["overlapped"] / n_covered, totals["origins_outside"])
    vals = ctx.values[covered].astype(np.float64)
    errs = ctx.stderr[covered].astype(np.float64)
    extra = {}
    if ctx.transfer is not None:
        extra["transfer"] = _transfer_info(ctx, covered, totals)
        warnings += transfer_warnings(extra["transfer"])
    return {
        "measure": s.measure,
        "units": measure_named(s.measure).units,
        "reach": s.reach,
        "inverted": s.invert,
        "size": [width, height],
        "rays": s.rays,
        "rays_per_sample": ctx.rays_per_sample,
        "map_of": ctx.key.to_dict(),
        "blockers": s.blockers,
        "coverage": n_covered / (width * height),
        "overlap": totals["overlapped"] / n_covered,
        "stats": {"min": float(vals.min()), "mean": float(vals.mean()), "max": float(vals.max())},
        "stderr_p95": float(np.percentile(errs, 95)),
        "miss_fraction": totals["misses"] / max(totals["rays"], 1),
        "escape_fraction": escape_fraction,
        "rays_traced": int(totals["rays"]),
        "rays_saved": int(totals["rays_cap"] - totals["rays"]),
        "surface_samples": int(totals["samples"]),
        "origins_closer": int(totals["origins_moved"]),
        "origins_outside": int(totals["origins_outside"]),
        "seconds": round(seconds, 3),
        "rays_per_second": totals["rays"] / max(seconds, 1e-9),
        "engine": getattr(ctx.engines[0], "name", type(ctx.engines[0]).__name__),
        "input": {"file": asset.name, "sha256": asset.sha256},
        "mesh": asset.report.to_dict(),
        "local_units": local_units(asset.face_scale, ctx.faces),
        "settings": s.to_dict(),
        "settings_hash": s.content_hash(),
        "run": ctx.run.to_dict(),
        "timing": timing,
        "warnings": warnings,
        **extra,
    }


def _transfer_info(ctx: _Context, covered: np.ndarray, totals: dict) -> dict:
    """The sidecar's ``transfer`` record: set-up, and how much of the target found the source."""
    from thickbake.pipeline.transfer import distance_spread

    lost = int(ctx.unprojected.sum())
    layout = int(covered.sum()) + lost
    info = ctx.transfer.describe()
    info.update({
        "layout_texels": layout,
        "unprojected_texels": lost,
        "unprojected_share": lost / max(layout, 1),
        "unprojected_samples": int(totals["unprojected_samples"]),
        "samples": int(totals["samples"] + totals["unprojected_samples"]),
        "distance": distance_spread(ctx.offset[covered]),
    })
    return info


def transfer_warnings(info: dict) -> list[str]:
    """What a bake from a source solid warns about: unprojected texels, a source that is not closed."""
    out = []
    if info["unprojected_texels"]:
        out.append(f"{info['unprojected_share']:.2%} of the target's texels found no point of the source "
                   "(left to padding) - raise the search distance or use a cage")
    for part in info["sources"]:
        if not part["watertight"]:
            out.append(f"the source {part['file']} is not closed ({part['boundary_edges']} open edges); "
                       "rays escaping through its holes count as the full reach")
    return out


#: Above these shares a bake says something is off (judgement calls, no published source): most rays
#: leaving the mesh means it has no inside (a single-sided card or an open sheet); a tenth of the
#: texels claimed twice means stacked islands or several UV sets sharing one map.
ESCAPE_WARNING_SHARE = 0.5
OVERLAP_WARNING_SHARE = 0.1


def bake_warnings(escape_fraction: float, overlap: float, origins_outside: int) -> list[str]:
    """Plain-words warnings about a finished bake (empty when nothing looks wrong).

    ``escape_fraction`` counts rays that left the mesh (no hit at any distance), not rays that merely
    went past the reach, so an occlusion bake of a closed mesh warns about nothing.
    """
    out = []
    if escape_fraction > ESCAPE_WARNING_SHARE:
        out.append(f"{escape_fraction:.0%} of the rays left the mesh without hitting it, so most texels read the full "
                   "reach: the mesh has no inside (a single-sided card or an open sheet?) - give it thickness or "
                   "close it, or bake such cards with a short --reach")
    if overlap > OVERLAP_WARNING_SHARE:
        out.append(f"{overlap:.0%} of the covered texels are claimed by more than one surface point (stacked or "
                   "mirrored UV islands, or several objects each with their own 0-1 UVs); those texels average them "
                   "- give such objects their own material (one map each) or their own UV space")
    if origins_outside:
        out.append(f"{origins_outside} samples could not start inside the solid even with a tiny offset "
                   "(intersecting or inside-out parts?) - run 'thickbake verify' on the mesh")
    return out


def _tile_side(chunk_rays: int, rays: int, supersample: int, width: int, height: int) -> int:
    """Power-of-two tile side so one tile holds about ``chunk_rays`` rays, 16 … 512 texels."""
    texels = max(1, chunk_rays // (rays * supersample * supersample))
    side = 1 << max(4, min(9, int(math.log2(max(1.0, math.sqrt(texels))))))
    # keep a few tiles per map for the thread pool even on small maps
    longest = max(width, height)
    while side > 16 and side * 2 > longest:
        side //= 2
    return side


def _ray_schedule(rays: int, adaptive: bool) -> list[tuple[int, int]]:
    """Ray index ranges of the successive batches (one batch unless adaptive).

    Adaptive batches end on the ladder 8, 12, 16, 24, 32, 48, 64, … (powers of two and 1.5 times
    them, every one a multiple of R = 4), then on ``rays``: steps of about √2 instead of doubling, so
    a sample that needs n rays to meet the target traces at most 1.5 n instead of up to 2 n.  A
    batch always covers whole rounds of replicates, and a sample that reaches the cap has traced the
    same rays as a fixed bake.
    """
    if not adaptive or rays <= ADAPTIVE_FIRST_BATCH:
        return [(0, rays)]
    bounds = [0]
    n = ADAPTIVE_FIRST_BATCH
    while n < rays:
        bounds.append(n)
        n += n // 2 if n & (n - 1) == 0 else n // 3
    bounds.append(rays)
    return list(zip(bounds[:-1], bounds[1:]))


def _bake_tile(ctx: _Context, tile_row: int, tile_col: int, members: np.ndarray) -> dict:
    """Rasterise, trace and reduce one tile; writes into the context's maps (disjoint texels)."""
    s = ctx.settings
    asset = ctx.asset
    width = s.width
    samples, overlapped = rasterise_tile(ctx.tri_px[members], members, ctx.jacobian[members], tile_row, tile_col,
                                         ctx.tile, width, s.height, s.supersample)
    n = len(samples)
    tally = dict.fromkeys(_TALLY_KEYS, 0)
    if n == 0:
        return tally
    if ctx.run.order == "morton":
        samples = samples.take(morton_order(samples.texel, width))
    if ctx.transfer is None:
        positions, normals = place_samples(asset.triangles, asset.triangle_normals, asset.face_normals, samples,
                                           s.bias)
        traced_face_normals, sample_face = asset.face_normals, samples.face
    else:  # measured in the source: the source's points, normals and faces stand in for the target's
        positions, normals, sample_face, found, offset = ctx.transfer.match(asset, samples, s.bias)
        traced_face_normals = ctx.transfer.solid.face_normals
        tally["unprojected_samples"] = int(n - found.sum())
        _record_projection(ctx, samples.texel, found, offset)
        samples = samples.take(np.flatnonzero(found))
        n = len(samples)
        if n == 0:
            return tally
    keys = sample_keys(samples.texel, samples.sub, samples.face)
    # Rays start behind the sample's own face plane, offset along the face normal: a shading normal
    # tilted far from its face (smoothed rims, bent file normals) would otherwise put the origin on
    # the wrong side of a neighbouring face.  The lobe stays about the shading normal.
    face_normals = traced_face_normals[sample_face]
    flat = ~(np.abs(face_normals).sum(axis=1) > 0)
    face_normals = np.where(flat[:, None], normals, face_normals)
    axis = (-normals).astype(np.float32)
    moments = Moments(n, replicate_count(ctx.rays_per_sample))
    engine_of_sample = ctx.engine_of_face[samples.face]
    for which in np.unique(engine_of_sample):
        engine = ctx.engines[int(which)]
        mine = np.flatnonzero(engine_of_sample == which)
        origins, sample_bias, unresolved = inward_origins(engine, positions[mine], face_normals[mine],
                                                          traced_face_normals, s.bias)
        tally["origins_moved"] += int((sample_bias < s.bias).sum())
        tally["origins_outside"] += unresolved
        inward = (-face_normals[mine]).astype(np.float32)
        _trace_samples(ctx, engine, mine, keys[mine], origins, sample_bias, inward, axis[mine], moments, tally,
                       samples.texel[mine])
    texels, mean, stderr, area, claims, rays = texel_reduce(samples.texel, moments.replicate_means(), samples.area,
                                                            moments.count)
    rows, cols = texels // width, texels % width
    ctx.values[rows, cols] = mean
    ctx.stderr[rows, cols] = stderr
    ctx.area[rows, cols] = area
    ctx.rays[rows, cols] = rays
    ctx.claims[rows, cols] = np.minimum(claims, 65535)
    tally.update(overlapped=overlapped, samples=n, rays_cap=n * ctx.rays_per_sample)
    return tally


def _record_projection(ctx: _Context, texel: np.ndarray, found: np.ndarray, offset: np.ndarray) -> None:
    """Mark the tile's texels none of whose samples found the source; store the mean projection distance."""
    width = ctx.settings.width
    lost = np.setdiff1d(texel[~found], texel[found])
    ctx.unprojected[lost // width, lost % width] = True
    texels, inverse = np.unique(texel[found], return_inverse=True)
    if len(texels):
        mean = np.bincount(inverse, weights=offset) / np.bincount(inverse)
        ctx.offset[texels // width, texels % width] = mean


def _trace_samples(ctx: _Context, engine: RayEngine, index: np.ndarray, keys: np.ndarray, origins: np.ndarray,
                   sample_bias: np.ndarray, inward: np.ndarray, axis: np.ndarray, moments: Moments,
                   tally: dict, texel: np.ndarray) -> None:
    """Trace the rays of some samples against one engine in engine-sized calls (batches along the
    ladder of :func:`_ray_schedule` when adaptive) and add their values to ``moments``.

    Parameters
    ----------
    index : (m,) int64
        Rows of ``moments`` (samples of the tile) these samples are.
    keys : (m,) uint64
        Sample keys (:func:`sample_keys`).
    origins : (m, 3) float32
        Ray origins behind the sample's face, scene units.
    sample_bias : (m,) float32
        How far behind the face each origin lies, scene units.
    inward : (m, 3) float32
        Unit inward face normal (the direction of the offset).
    axis : (m, 3) float32
        Unit inward shading normal of each sample (the lobe axis).
    tally : dict
        ``rays``, ``misses`` (no hit within reach) and ``escapes`` (no hit at all) are added to it.
    texel : (m,) int64
        Texel of each sample (row-major): adaptive sampling pools variances over aligned blocks of them.
    """
    s = ctx.settings
    measure = measure_named(s.measure)
    far = max(float(s.reach), ctx.escape_distance)
    active = np.arange(len(index))
    adaptive = s.target_error is not None
    replicates = moments.replicates
    if adaptive:
        _, block = np.unique(block_labels(texel, s.width, ADAPTIVE_POOL_BLOCK), return_inverse=True)
    for ray_start, ray_stop in _ray_schedule(ctx.rays_per_sample, adaptive):
        k = ray_stop - ray_start
        per_call = max(1, min(ctx.run.chunk_rays, RAYS_PER_CALL) // k)
        for lo in range(0, len(active), per_call):
            idx = active[lo:lo + per_call]
            u1, u2 = variates(s.seed, keys[idx], ray_start, ray_stop, s.sequence, replicates)
            directions, _ = ray_directions(u1, u2, axis[idx], s.cone, s.lobe)
            ray_origins = np.repeat(origins[idx], k, axis=0)
            distance, hit_any = engine.first_hit(ray_origins, directions, far)
            # chord from the surface point rather than the offset origin: the origin lies
            # bias·(d · −n_face) further along the ray, so adding that removes the offset exactly for
            # a ray that leaves through a wall parallel to the face; otherwise a residual of order
            # bias·(1 − cos²)/cos remains, whose sign depends on the curvature at the exit
            along = np.einsum("nkj,nj->nk", directions.reshape(len(idx), k, 3), inward[idx])
            distance = distance.reshape(len(idx), k)
            # a lobe about a tilted shading normal holds directions that point out through the
            # sample's own face: from the surface point such a ray leaves the solid at once (chord 0,
            # the bias → 0 limit), whereas from the offset origin it would cross the face plane
            # b/cos further on, possibly beyond the triangle's edge, and read a chord or an escape
            leaves = along <= 0
            hit_any = hit_any.reshape(len(idx), k) | leaves
            distance = np.where(leaves, np.float32(0), distance)
            hit = hit_any & (distance < s.reach)
            chord = np.where(leaves, np.float32(0), distance + sample_bias[idx, None] * along)
            moments.add(index[idx], measure.ray_values(chord, hit, s.reach, s.attenuation_distance))
            tally["misses"] += int(hit.size - np.count_nonzero(hit))
            tally["escapes"] += int(hit_any.size - np.count_nonzero(hit_any))
            tally["rays"] += hit.size
        if adaptive:
            active = active[_needs_more(moments, index[active], block[active], s.target_error, ctx.rays_per_sample)]
            if len(active) == 0:
                break


def _needs_more(moments: Moments, rows: np.ndarray, block: np.ndarray, target: float, cap: int) -> np.ndarray:
    """(m,) bool: which of the still active samples (``rows`` of ``moments``) trace another batch.

    All of them have traced the same rays so far.  A sample goes on while its moderated variance —
    its own replicate variance shrunk towards the local prior of the other active samples of its
    aligned block (:func:`thickbake.pipeline.measures.moderated_variance`, Smyth 2004) — exceeds
    ``target``² and it is below the cap.  The prior degrees of freedom d₀ are estimated once from all
    the active samples of the tile (:func:`thickbake.pipeline.measures.prior_dof`, each compared with
    its block), as the map's moderation estimates one d₀ per map: one block's 16·supersample² samples
    are far too few to estimate a spread of spreads.  An adaptive bake's tiles are cut for
    :data:`ADAPTIVE_TILE_RAYS`, not the run's ``chunk_rays``, so the map does not depend on it.  An
    own variance on R − 1 = 3 degrees of freedom alone is noisy both ways: a thin-wall sample whose few rays all missed the rare long grazing chords reports a tiny
    spread and would stop with a large error, while of the samples whose true error just meets the
    target 39% report one above it (P(χ²₃/3 > 1) = 0.39) and trace on.  Neighbours see nearly the
    same integrand with independent randomisations, so where they agree the decision rests on many
    more degrees of freedom; where the tile's samples differ from their neighbours the estimated prior
    weight falls and each sample's own spread counts for more.
    """
    var = np.square(moments.stderr()[rows])
    dof = moments.replicates - 1
    _, group = np.unique(block, return_inverse=True)
    moderated, _ = moderated_variance(var, dof, group, prior_dof(var, dof, group))
    return (moderated > target * target) & (moments.count[rows] < cap)
