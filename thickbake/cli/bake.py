"""``thickbake bake``: one mesh into a map and its sidecar."""

from __future__ import annotations

import os
from pathlib import Path

from thickbake.cli.options import add_bake_options, settings_from_args
from thickbake.cli.output import EXIT_OK, echo, print_warnings, verbose_lines

EXAMPLES = """examples:
  thickbake bake samples/candle.glb                       writes samples/candle.thickness.png + .json
  thickbake bake leaf.obj -o maps/leaf.png --size 2048 --rays 128
  thickbake bake statue.glb --measure transmittance --attenuation-distance 0.05 -o statue.tif"""


def default_output(mesh: str, measure: str) -> str:
    """``STEM.MEASURE.png`` beside the input: the one default naming pattern."""
    path = Path(mesh)
    stem = path.name[: -len(path.suffix)] if path.suffix else path.name
    return str(path.with_name(f"{stem}.{measure}.png"))


def add_parser(sub, common) -> None:
    p = sub.add_parser("bake", parents=[common], help="bake one mesh into a map and its JSON sidecar",
                       description="Bake one UV-mapped mesh into a thickness map (PNG 16/8-bit or float TIFF) "
                                   "plus a JSON sidecar (same name, .json) that says how to decode it.",
                       epilog=EXAMPLES)
    p.add_argument("mesh", metavar="MESH", help="the asset to bake: OBJ, glTF/GLB or PLY file with UV coordinates")
    p.add_argument("-o", "--output", metavar="OUT",
                   help="OUT.png (encoded, see the sidecar) or OUT.tif (float32 measure); "
                        "default MESH-STEM.MEASURE.png beside the input")
    p.add_argument("--error-out", metavar="FILE.tif", help="also write the per-texel standard error as a float TIFF")
    add_bake_options(p)
    p.set_defaults(func=run)


def run(args) -> int:
    from thickbake.maps.files import check_output_path
    from thickbake.pipeline.driver import bake
    from thickbake.pipeline.load import load_asset
    from thickbake.cli.progress import ProgressBar

    settings, run_options = settings_from_args(args)
    output = args.output or default_output(args.mesh, settings.measure)
    check_output_path(output, args.error_out)
    asset = load_asset(args.mesh)
    print_warnings(asset.report.warnings, args.mesh)
    bar = ProgressBar(f"baking {os.path.basename(args.mesh)}", enabled=False if args.quiet else None)
    try:
        result = bake(asset, settings, run_options, progress=bar)
    finally:
        bar.close()
    result.write(output, error_out=args.error_out)
    print_warnings(result.info["warnings"], args.mesh)
    if not args.quiet:
        echo(summary_line(result, args.mesh, output))
    if args.verbose:
        info = result.info
        verbose_lines([f"settings: {_settings_text(info['settings'])}", f"run: {_settings_text(info['run'])}",
                       f"timing: setup {info['timing']['setup_seconds']:.3f} s, trace {info['timing']['trace_seconds']:.3f} s, "
                       f"total {info['seconds']:.3f} s on engine {info['engine']}"])
    return EXIT_OK


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
    if info["miss_fraction"] > 0:
        extra += f", {info['miss_fraction']:.2%} of rays escaped"
    return (f"{source} -> {out}: {w}x{h}, {int(result.covered.sum()):,} texels ({info['coverage']:.1%} covered{extra}), "
            f"{info['rays_traced']:,} rays at {info['rays_per_second'] / 1e6:.2f}M rays/s in {info['seconds']:.1f} s; "
            f"{info['measure']} min {st['min']:.4g} mean {st['mean']:.4g} max {st['max']:.4g}{units}")
