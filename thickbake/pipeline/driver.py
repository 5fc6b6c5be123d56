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
from thickbake.pipeline.directions import ray_directions, sample_keys, variates
from thickbake.maps.encode import normalise, quantise
from thickbake.errors import ThickbakeError
from thickbake.measures import measure_named
from thickbake.pipeline.measures import Moments, texel_reduce
from thickbake.pipeline.load import Asset, load_asset
from thickbake.pipeline.finish import fit_reach, medium_record, medium_scale
from thickbake.maps.files import check_output_path, write_map
from thickbake.maps.padding import pad_map
from thickbake.maps.sidecar import build_sidecar, with_error_map
from thickbake.pipeline.trace import RayEngine
from thickbake.settings import BakeSettings, RunOptions, check_memory, split_options
from thickbake.pipeline.origins import inward_origins
from thickbake.pipeline.texels import morton_order, pixel_triangles, place_samples, rasterise_tile, tile_buckets

#: First batch of rays per sample in adaptive mode; later batches double the count, so every sample
#: ends on a power-of-two prefix of its low-discrepancy sequence.  16 rays give a usable variance
#: estimate (its relative standard error is about √(2/15) ≈ 37% for near-normal values).
ADAPTIVE_FIRST_BATCH = 16
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
        Standard error of each texel's mean, measure units.
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
    """

    values: np.ndarray
    covered: np.ndarray
    stderr: np.ndarray
    area: np.ndarray
    rays: np.ndarray
    settings: BakeSettings
    info: dict = field(default_factory=dict)
    run: RunOptions = field(default_factory=RunOptions)

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

            sidecar["encoding"]["sample_type"] = exr_type
            return exr_bytes(image, sidecar_attributes(sidecar), exr_type), sidecar
        return image_bytes(image, suffix), sidecar

    def write(self, map_path: str | os.PathLike, error_out: str | os.PathLike | None = None,
              exr_type: str = "float") -> Path:
        """Write the map (PNG codes or float32 TIFF of the measure) and its sidecar, atomically."""
        path = check_output_path(map_path, error_out)
        extra = {}
        if error_out is not None:
            extra[Path(error_out)] = self.stderr
        data, sidecar = self.encode(path.name, exr_type=exr_type)
        if error_out is not None:
            sidecar = with_error_map(sidecar, error_out)
        write_map(path, data, sidecar, extra)
        return path


@dataclass
class _Context:
    """What every tile of one bake shares: inputs, resolved options, and the maps tiles write into."""

    asset: Asset
    settings: BakeSettings
    run: RunOptions
    engine: RayEngine
    tri_px: np.ndarray
    jacobian: np.ndarray
    tile: int
    rays_per_sample: int
    values: np.ndarray
    stderr: np.ndarray
    area: np.ndarray
    rays: np.ndarray
    claims: np.ndarray


#: Figures each tile reports, summed over the bake.
_TALLY_KEYS = ("rays", "misses", "overlapped", "samples", "rays_cap", "origins_moved", "origins_outside")


def bake(mesh, settings: BakeSettings | None = None, run: RunOptions | None = None, *,
         progress: Callable[[float, int], None] | None = None, engine: RayEngine | None = None,
         **options) -> BakeResult:
    """Bake a thickness-type map of a UV-mapped mesh.

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
        A ray engine over the asset's trace mesh (see :mod:`thickbake.pipeline.trace`); built if omitted.
    **options
        Fields of either object (``size=512``, ``threads=2``), overriding ``settings`` and ``run``.

    Returns
    -------
    BakeResult

    Examples
    --------
    >>> import thickbake
    >>> from thickbake.checks import shapes
    >>> result = thickbake.bake(shapes.sphere(radius=1.0).mesh, size=64, rays=16, cone=0)
    >>> bool(abs(result.values[result.covered].mean() - 2.0) < 0.01)
    True
    """
    start = time.perf_counter()
    settings, run = _with_options(settings, run, options)
    asset = mesh if isinstance(mesh, Asset) else load_asset(mesh)
    fit = settings.reach == "fit"
    mm_per_unit = medium_scale(settings, asset.path)  # a missing unit is refused before any tracing
    s = settings.resolve(asset.diagonal)
    r = run.resolve()
    if engine is None:
        from thickbake.pipeline.trace import make_engine
        engine = make_engine(asset.trace_vertices, asset.trace_faces)
    ctx, tiles, starts, members = _prepare(asset, s, r, engine)
    setup_seconds = time.perf_counter() - start
    totals = _run_tiles(ctx, tiles, starts, members, progress)
    trace_seconds = time.perf_counter() - start - setup_seconds

    covered = ctx.claims > 0
    if not covered.any():
        raise ThickbakeError("no texel of the map is covered by the UV layout", path=asset.path,
                             fix="check the UVs lie inside the 0–1 square")
    timing = {"setup_seconds": round(setup_seconds, 3), "trace_seconds": round(trace_seconds, 3)}
    info = _bake_info(ctx, covered, totals, time.perf_counter() - start, timing)
    if fit:
        reach, info["reach_fit"] = fit_reach(ctx.values, covered, s.reach)
        s = s.replace(reach=reach)
        info.update(reach=reach, settings=s.to_dict(), settings_hash=s.content_hash())
    if mm_per_unit is not None:
        info["medium"] = medium_record(s, mm_per_unit)
    return BakeResult(values=ctx.values, covered=covered, stderr=ctx.stderr, area=ctx.area, rays=ctx.rays,
                      settings=s, info=info, run=r)


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


def _prepare(asset: Asset, s: BakeSettings, r: RunOptions, engine: RayEngine):
    """The shared context of a bake and its tiles: (context, tiles, starts, members) of :func:`tile_buckets`."""
    width, height = s.size
    tri_px, valid, jacobian, _ = pixel_triangles(asset.triangles, asset.triangle_uv, asset.has_uv, width, height)
    rays_per_sample = 1 if s.cone == 0 else s.rays
    tile = _tile_side(r.chunk_rays, rays_per_sample, s.supersample, width, height)
    tiles, starts, members = tile_buckets(tri_px, valid, width, height, tile)
    ctx = _Context(
        asset=asset, settings=s, run=r, engine=engine, tri_px=tri_px, jacobian=jacobian, tile=tile,
        rays_per_sample=rays_per_sample,
        values=np.zeros((height, width), np.float32), stderr=np.zeros((height, width), np.float32),
        area=np.zeros((height, width), np.float32), rays=np.zeros((height, width), np.int32),
        claims=np.zeros((height, width), np.uint16),
    )
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
    warnings = bake_warnings(totals["misses"] / max(totals["rays"], 1), totals["overlapped"] / n_covered,
                             totals["origins_outside"])
    vals = ctx.values[covered].astype(np.float64)
    errs = ctx.stderr[covered].astype(np.float64)
    return {
        "measure": s.measure,
        "units": measure_named(s.measure).units,
        "reach": s.reach,
        "inverted": s.invert,
        "size": [width, height],
        "rays": s.rays,
        "rays_per_sample": ctx.rays_per_sample,
        "coverage": n_covered / (width * height),
        "overlap": totals["overlapped"] / n_covered,
        "stats": {"min": float(vals.min()), "mean": float(vals.mean()), "max": float(vals.max())},
        "stderr_p95": float(np.percentile(errs, 95)),
        "miss_fraction": totals["misses"] / max(totals["rays"], 1),
        "rays_traced": int(totals["rays"]),
        "rays_saved": int(totals["rays_cap"] - totals["rays"]),
        "surface_samples": int(totals["samples"]),
        "origins_closer": int(totals["origins_moved"]),
        "origins_outside": int(totals["origins_outside"]),
        "seconds": round(seconds, 3),
        "rays_per_second": totals["rays"] / max(seconds, 1e-9),
        "engine": getattr(ctx.engine, "name", type(ctx.engine).__name__),
        "input": {"file": asset.name, "sha256": asset.sha256},
        "mesh": asset.report.to_dict(),
        "settings": s.to_dict(),
        "settings_hash": s.content_hash(),
        "run": ctx.run.to_dict(),
        "timing": timing,
        "warnings": warnings,
    }


#: Above these shares a bake says something is off (judgement calls, no published source): most rays
#: leaving the mesh means it has no inside (a single-sided card or an open sheet); a tenth of the
#: texels claimed twice means stacked islands or several UV sets sharing one map.
ESCAPE_WARNING_SHARE = 0.5
OVERLAP_WARNING_SHARE = 0.1


def bake_warnings(miss_fraction: float, overlap: float, origins_outside: int) -> list[str]:
    """Plain-words warnings about a finished bake (empty when nothing looks wrong)."""
    out = []
    if miss_fraction > ESCAPE_WARNING_SHARE:
        out.append(f"{miss_fraction:.0%} of the rays left the mesh without hitting it, so most texels read the full "
                   "reach: the mesh has no inside (a single-sided card or an open sheet?) - give it thickness or "
                   "close it, or bake such cards with a short --reach")
    if overlap > OVERLAP_WARNING_SHARE:
        out.append(f"{overlap:.0%} of the covered texels are claimed by more than one surface point (stacked or "
                   "mirrored UV islands, or several objects each with their own 0-1 UVs); those texels average them "
                   "- bake such objects separately if they need their own maps")
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
    """Ray index ranges of the successive batches (one batch unless adaptive)."""
    if not adaptive or rays <= ADAPTIVE_FIRST_BATCH:
        return [(0, rays)]
    bounds = [0]
    n = ADAPTIVE_FIRST_BATCH
    while n < rays:
        bounds.append(n)
        n *= 2
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
    if n == 0:
        return dict.fromkeys(_TALLY_KEYS, 0)
    if ctx.run.order == "morton":
        samples = samples.take(morton_order(samples.texel, width))
    positions, normals = place_samples(asset.triangles, asset.triangle_normals, asset.face_normals, samples, s.bias)
    keys = sample_keys(samples.texel, samples.sub, samples.face)
    origins, sample_bias, unresolved = inward_origins(ctx.engine, positions, normals, asset.face_normals, s.bias)
    moments, traced, misses = _trace_samples(ctx, keys, origins, sample_bias, (-normals).astype(np.float32))
    texels, mean, stderr, area, claims, rays = texel_reduce(samples.texel, moments.mean(), moments.stderr(),
                                                            samples.area, moments.count)
    rows, cols = texels // width, texels % width
    ctx.values[rows, cols] = mean
    ctx.stderr[rows, cols] = stderr
    ctx.area[rows, cols] = area
    ctx.rays[rows, cols] = rays
    ctx.claims[rows, cols] = np.minimum(claims, 65535)
    return {"rays": traced, "misses": misses, "overlapped": overlapped, "samples": n,
            "rays_cap": n * ctx.rays_per_sample, "origins_moved": int((sample_bias < s.bias).sum()),
            "origins_outside": unresolved}


def _trace_samples(ctx: _Context, keys: np.ndarray, origins: np.ndarray, sample_bias: np.ndarray,
                   axis: np.ndarray) -> tuple[Moments, int, int]:
    """Trace every sample's rays in engine-sized calls (batches of doubling size when adaptive).

    Parameters
    ----------
    keys : (n,) uint64
        Sample keys (:func:`sample_keys`).
    origins : (n, 3) float32
        Ray origins inside the surface, scene units.
    sample_bias : (n,) float32
        How far inside each origin lies, scene units.
    axis : (n, 3) float32
        Unit inward normal of each sample (the lobe axis).

    Returns
    -------
    moments : Moments
        Per-sample running sums of the measure's per-ray values.
    traced, misses : int
        Rays traced, and of those the ones that hit nothing within reach.
    """
    s = ctx.settings
    measure = measure_named(s.measure)
    n = len(keys)
    moments = Moments(n)
    misses = 0
    traced = 0
    active = np.arange(n)
    adaptive = s.target_error is not None
    for ray_start, ray_stop in _ray_schedule(ctx.rays_per_sample, adaptive):
        k = ray_stop - ray_start
        per_call = max(1, min(ctx.run.chunk_rays, RAYS_PER_CALL) // k)
        for lo in range(0, len(active), per_call):
            idx = active[lo:lo + per_call]
            u1, u2 = variates(s.seed, keys[idx], ray_start, ray_stop, s.sequence)
            directions, cos_theta = ray_directions(u1, u2, axis[idx], s.cone, s.lobe)
            ray_origins = np.repeat(origins[idx], k, axis=0)
            distance, hit = ctx.engine.first_hit(ray_origins, directions, s.reach)
            # chord from the surface point rather than the biased origin: adding bias·cosθ removes the
            # bias exactly along the normal; off the normal a residual of order bias·(1−cos²θ)/cosθ
            # remains, whose sign depends on the curvature at the exit (no universal correction)
            chord = distance.reshape(len(idx), k) + sample_bias[idx, None] * cos_theta
            hit = hit.reshape(len(idx), k)
            moments.add(idx, measure.ray_values(chord, hit, s.reach, s.attenuation_distance))
            misses += int(hit.size - np.count_nonzero(hit))
            traced += hit.size
        if adaptive:
            more = (moments.stderr()[active] > s.target_error) & (moments.count[active] < ctx.rays_per_sample)
            active = active[more]
            if len(active) == 0:
                break
    return moments, traced, misses
