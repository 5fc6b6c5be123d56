"""``thickbake bake``: one mesh into its maps (one per material, UV set and UDIM tile) and their sidecars."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from thickbake.cli.options import add_bake_options, add_transfer_options, settings_from_args, transfer_from_args
from thickbake.cli.output import EXIT_FAILED, EXIT_OK, echo, print_warnings, strict_failure, verbose_lines

EXAMPLES = """examples:
  thickbake bake samples/candle.glb                       writes samples/candle.thickness.png + .json
  thickbake bake bust_low.obj --from bust_high.obj -o maps/bust.exr --size 2048   (measured in the sculpt)
  thickbake bake candle.glb --reach fit --medium marble -o candle.rgb.png --write-gltf candle.volume.glb
  thickbake bake car.glb -o maps/ --blockers own --strict    one map per material: maps/car.body.thickness.png ..."""


def default_output(mesh: str, measure: str) -> str:
    """``STEM.MEASURE.png`` beside the input: the default name of a single-map asset (see
    :mod:`thickbake.maps.naming` for several maps)."""
    from thickbake.maps.naming import default_name, name_fields, stem_of

    fields = name_fields(stem_of(mesh), measure, [{"material": None, "uv_set": 0, "tile": None}])[0]
    return str(Path(mesh).with_name(default_name(fields)))


def add_parser(sub, common) -> None:
    p = sub.add_parser("bake", parents=[common], help="bake one mesh into maps and their JSON sidecars",
                       description="Bake one UV-mapped mesh into thickness maps (PNG 16/8-bit, float TIFF or EXR), "
                                   "one per material, UV set and UDIM tile, each with a JSON sidecar (same name, "
                                   ".json) that says how to decode it and which part of the asset it holds.",
                       epilog=EXAMPLES)
    p.add_argument("mesh", metavar="MESH", nargs="?",
                   help="the asset to bake: OBJ, glTF/GLB or PLY file with UV coordinates")
    p.add_argument("-o", "--output", metavar="OUT",
                   help="OUT.png (encoded, see the sidecar), OUT.tif (float32 measure) or OUT.exr (half/float); "
                        "for several maps each map's material/UV set/tile is inserted before the suffix.  A folder "
                        "(existing, or ending in /) takes the default names; a pattern may use {stem} {material} "
                        "{uvset} {tile} {measure}.  Default STEM[.MATERIAL][.uvN][.TILE].MEASURE.png beside the "
                        "input (none with --pack-into alone)")
    p.add_argument("--error-out", metavar="FILE.tif",
                   help="also write the per-texel standard error as a float TIFF (named like -o for several maps)")
    p.add_argument("--strict", action="store_true",
                   help="treat every warning as a failure: exit 1 when any was printed (the maps are still written)")
    d = p.add_argument_group("delivery")
    d.add_argument("--write-gltf", metavar="OUT.glb|OUT.gltf",
                   help="also write a copy of the glTF asset whose baked materials carry KHR_materials_volume "
                        "(thicknessTexture, thicknessFactor in the mesh's units; with --medium the attenuation)")
    d.add_argument("--gltf-transmission", type=float, metavar="F",
                   help="with --write-gltf, also set KHR_materials_transmission transmissionFactor F (0-1)")
    d.add_argument("--pack-into", metavar="IMAGE.png",
                   help="write the map into one channel of a new or existing RGBA PNG (other channels kept)")
    d.add_argument("--channel", action="append", metavar="C|C=MEASURE",
                   help="channel for --pack-into: r, g, b or a; repeat as r=thickness --channel b=occlusion to "
                        "bake several measures into several channels in one run")
    d.add_argument("--exr-type", choices=("float", "half"), default="float",
                   help="sample type of an .exr output (default float)")
    add_bake_options(p)
    add_transfer_options(p, mask=True)
    p.set_defaults(func=run)


@dataclass
class _BakePlan:
    """Everything ``bake`` decided before tracing: the settings, the asset and where each output goes."""

    settings: object
    run_options: object
    transfer: dict
    channels: list[tuple[str, str]]
    asset: object
    groups: list
    outputs: list | None  # one map path per group; None with --pack-into alone
    errors: list
    masks: list
    volume_plan: object = None


def run(args) -> int:
    from thickbake.errors import ThickbakeError

    if args.medium is not None and args.medium.lower() == "list":
        from thickbake.media import preset_table

        for line in preset_table():
            echo(line)
        return EXIT_OK
    if args.mesh is None:
        raise ThickbakeError("no mesh given", fix="thickbake bake MESH [options]; see 'thickbake bake --help'")
    plan = _resolve(args)
    # in a transfer the target is not traced: its holes and winding do not matter, its UVs do
    warned = [w for w in plan.asset.report.warnings if not plan.transfer or "UV" in w]
    print_warnings(warned, args.mesh)
    baked = _bake(args, plan)
    written = _write_outputs(args, plan, baked)
    warned += _print_results(args, plan, baked, written)
    if args.strict and warned:
        strict_failure(len(warned))
        return EXIT_FAILED
    return EXIT_OK


def _resolve(args) -> _BakePlan:
    """Check the options and the asset and name every output, refusing bad input before any bake."""
    from thickbake.errors import ThickbakeError
    from thickbake.pipeline.groups import map_groups
    from thickbake.pipeline.load import load_asset

    settings, run_options = settings_from_args(args)
    transfer = transfer_from_args(args)
    channels = _channel_plan(args, settings)
    if args.gltf_transmission is not None and not args.write_gltf:
        raise ThickbakeError("--gltf-transmission goes with --write-gltf", fix="give --write-gltf OUT.glb as well")
    for flag, given in (("--error-out", args.error_out), ("--unprojected-mask", args.unprojected_mask)):
        if given and args.output is None and args.pack_into:
            raise ThickbakeError(f"{flag} goes with a map output", fix="give -o OUT as well")
    asset = load_asset(args.mesh)
    groups, _ = map_groups(asset, settings.uv_set)
    plan = _BakePlan(settings, run_options, transfer, channels, asset, groups, *_output_paths(args, settings, groups))
    if args.pack_into and len(groups) > 1:
        raise ThickbakeError(f"--pack-into packs one map, and the asset makes {len(groups)} (one per material, UV set "
                             "and tile)", path=args.mesh, fix="bake the maps into files with -o, then pack them")
    if args.write_gltf:
        from thickbake.pipeline.deliver import check_volume_request

        if any(g.key.tile is not None for g in groups):
            raise ThickbakeError("the UV layout spans UDIM tiles, which glTF textures cannot address", path=args.mesh,
                                 fix="keep the UVs in the 0-1 square for --write-gltf, or bake without it")
        plan.volume_plan = check_volume_request(args.mesh, args.write_gltf, settings, uv_set=settings.uv_set,
                                                transmission=args.gltf_transmission)
    if args.pack_into:
        from thickbake.maps.packing import load_target

        load_target(args.pack_into, settings.bits)  # an unreadable target is refused before baking
    return plan


def _output_paths(args, settings, groups) -> tuple[list | None, list, list]:
    """(maps, error maps, unprojected masks): one path (or None) per group, each checked as an output."""
    from thickbake.errors import ThickbakeError
    from thickbake.maps.files import check_output_path
    from thickbake.maps.naming import output_paths

    keys = [dict(g.key.to_dict(), material_index=g.key.material_index) for g in groups]
    outputs = None if (args.output is None and args.pack_into) else \
        output_paths(args.output, args.mesh, settings.measure, keys)
    errors = output_paths(args.error_out, args.mesh, settings.measure, keys) if args.error_out else [None] * len(keys)
    masks = (output_paths(args.unprojected_mask, args.mesh, "unprojected", keys) if args.unprojected_mask
             else [None] * len(keys))
    for out, err, mask in zip(outputs or [], errors, masks):
        check_output_path(out, err)
        if mask is not None:
            _check_mask_path(mask, out, err)
        if settings.medium and out.suffix.lower() in (".tif", ".tiff"):
            raise ThickbakeError("an RGB transmittance map cannot be a float TIFF", path=out,
                                 fix="name it .png or .exr")
    return outputs, errors, masks


def _bake(args, plan: _BakePlan) -> dict:
    """{measure: [BakeResult per group]}: the bake's own measure, then each other measure a channel asks for."""
    from thickbake.cli.progress import ProgressBar
    from thickbake.pipeline.deliver import settings_for_measure
    from thickbake.pipeline.driver import bake_maps

    transfer = plan.transfer
    if transfer:
        from thickbake.pipeline.transfer import load_source

        transfer["source"] = load_source(transfer["source"])  # once, for every measure baked
    baked = {}
    for measure in dict.fromkeys([plan.settings.measure] + [m for _, m in plan.channels]):
        label = f"baking {os.path.basename(args.mesh)}" + (f" ({measure})" if len(plan.channels) > 1 else "")
        bar = ProgressBar(label, enabled=False if args.quiet else None)
        try:
            baked[measure] = bake_maps(plan.asset, settings_for_measure(plan.settings, measure), plan.run_options,
                                       progress=bar, **transfer)
        finally:
            bar.close()
    return baked


def _write_outputs(args, plan: _BakePlan, baked: dict) -> list[list]:
    """Write the glTF copy, the packed image and the maps; returns the files written for each map."""
    settings = plan.settings
    results = baked[settings.measure]
    written = [[] for _ in results]
    if plan.volume_plan is not None:
        from thickbake.pipeline.deliver import write_gltf_copy

        maps = ([(results[0], None, settings.uv_set)] if len(results) == 1 else
                [(r, [r.key.material_index], settings.uv_set) for r in results if r.key.material_index is not None])
        report = write_gltf_copy(args.mesh, args.write_gltf, plan.volume_plan, maps, args.gltf_transmission)
        print_warnings(report.pop("warnings"), args.write_gltf)
        for r in results:
            r.info["gltf"] = report
        written[0].append(args.write_gltf)
    if args.pack_into:
        results[0].info["packed_into"] = _pack(args.pack_into, plan.channels, {m: rs[0] for m, rs in baked.items()},
                                               settings.bits)
        written[0].append(args.pack_into)
    for i, result in enumerate(results):
        if plan.outputs is not None:
            result.write(plan.outputs[i], error_out=plan.errors[i], exr_type=args.exr_type,
                         unprojected_out=plan.masks[i])
            written[i].insert(0, plan.outputs[i])
    return written


def _print_results(args, plan: _BakePlan, baked: dict, written: list[list]) -> list[str]:
    """Print each map's warnings and summary line (and with -v the settings and timings); returns the
    warnings printed."""
    results = baked[plan.settings.measure]
    warned = []
    for i, result in enumerate(results):
        where = args.mesh if len(results) == 1 else f"{args.mesh} ({_key_label(result)})"
        for other in baked.values():
            print_warnings(other[i].info["warnings"], where)
            warned += other[i].info["warnings"]
        if not args.quiet:
            echo(summary_line(result, args.mesh, ", ".join(map(str, written[i]))))
    if args.verbose:
        info = results[0].info
        verbose_lines([f"settings: {_settings_text(info['settings'])}", f"run: {_settings_text(info['run'])}"]
                      + [f"timing: {_key_label(r) + ': ' if len(results) > 1 else ''}setup "
                         f"{r.info['timing']['setup_seconds']:.3f} s, trace {r.info['timing']['trace_seconds']:.3f} s, "
                         f"total {r.info['seconds']:.3f} s on engine {r.info['engine']}" for r in results])
    return warned


def _key_label(result) -> str:
    key = result.key
    return " ".join(x for x in (f"material {key.material_label}", f"UV set {key.uv_set}" if key.uv_set else "",
                                f"tile {key.tile}" if key.tile is not None else "") if x)


def _check_mask_path(mask, output, error_out) -> None:
    """The unprojected-texel mask is a PNG of its own, not one of the other outputs or a folder."""
    from thickbake.errors import ThickbakeError

    mask = Path(mask)
    if mask.suffix.lower() != ".png":
        raise ThickbakeError("the unprojected-texel mask is an 8-bit PNG", path=mask, fix="name it .png")
    if mask.resolve() in {Path(p).resolve() for p in (output, error_out) if p is not None}:
        raise ThickbakeError("the unprojected-texel mask would overwrite another output", path=mask,
                             fix="give it its own name")
    if mask.is_dir():
        raise ThickbakeError("the unprojected-texel mask would overwrite a folder", path=mask, fix="give a file name")


def _channel_plan(args, settings) -> list[tuple[str, str]]:
    """[(channel, measure)] for --pack-into; several measures need CHANNEL=MEASURE for each."""
    from thickbake.errors import ThickbakeError
    from thickbake.maps.packing import parse_channel_spec

    if not args.pack_into:
        if args.channel:
            raise ThickbakeError("--channel goes with --pack-into", fix="give --pack-into IMAGE.png as well")
        return []
    if Path(args.pack_into).suffix.lower() != ".png":
        raise ThickbakeError("channel packing writes PNG images", path=args.pack_into, fix="name the image .png")
    if not args.channel:
        raise ThickbakeError("--pack-into needs the channel to write", fix="add --channel r, g, b or a")
    specs = [parse_channel_spec(c) for c in args.channel]
    named = [m for _, m in specs if m]
    if named and len(named) != len(specs):
        raise ThickbakeError("with several measures every --channel names its measure",
                             fix="write them as --channel r=thickness --channel b=occlusion")
    if named and args.measure is not None:
        raise ThickbakeError("--measure and --channel C=MEASURE both choose the measure", fix="give one of them")
    seen = [c for c, _ in specs]
    if len(set(seen)) != len(seen):
        raise ThickbakeError("a channel is given twice", fix="give each of r, g, b, a at most once")
    out = [(c, m or settings.measure) for c, m in specs]
    from thickbake.settings import MEASURES

    for _, m in out:
        if m not in MEASURES:
            raise ThickbakeError(f"unknown measure {m!r} in --channel", fix=f"use one of {', '.join(MEASURES)}")
    return out


def _pack(image: str, channels, results: dict, bits: int) -> dict:
    """Write the packed PNG and its sidecar; returns the map sidecar's record of it."""
    from thickbake.maps.files import write_map
    from thickbake.pipeline.deliver import packed_outputs

    data, sidecar, record = packed_outputs(image, channels, results, bits)
    write_map(image, data, sidecar)
    return record


def _settings_text(settings: dict) -> str:
    return " ".join(f"{k}={'x'.join(map(str, v)) if k == 'size' else v}" for k, v in settings.items())


def summary_line(result, source: str, out: str) -> str:
    """The one line a bake prints on stdout."""
    info = result.info
    w, h = info["size"]
    from thickbake.measures import measure_named

    label = measure_named(info["measure"]).unit_label
    units = f" {label}" if label else ""
    st = info["stats"]
    extra = ""
    if info["overlap"] > 0:
        extra += f", {info['overlap']:.1%} of texels on overlapping UVs"
    if info.get("escape_fraction", 0) > 0:
        extra += f", {info['escape_fraction']:.2%} of rays escaped"
    if "transfer" in info:
        t = info["transfer"]
        extra += f", measured in {', '.join(part['file'] for part in t['sources'])}"
        if t["unprojected_texels"]:
            extra += f", {t['unprojected_share']:.2%} of texels found no source point"
    return (f"{source} -> {out}: {w}x{h}, {int(result.covered.sum()):,} texels ({info['coverage']:.1%} covered{extra}), "
            f"{info['rays_traced']:,} rays at {info['rays_per_second'] / 1e6:.2f}M rays/s in {info['seconds']:.1f} s; "
            f"{info['measure']} min {st['min']:.4g} mean {st['mean']:.4g} max {st['max']:.4g}{units}")
