"""Command line: a thin layer over the library.

``thickbake bake | verify | shapes | compare | batch``.  Parsing builds a :class:`BakeSettings` from the
options actually given; each command calls the library and turns :class:`ThickbakeError` into one
line on stderr and exit code 2.  Heavy modules are imported inside the commands so ``--help``
answers at once.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

from thickbake.errors import ThickbakeError

EXIT_OK, EXIT_FAIL, EXIT_USAGE = 0, 1, 2


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors (exit 2) instead of the usage dump."""

    def error(self, message):  # noqa: D401 - argparse API
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message} (see '{self.prog} --help')\n")


# ---------------------------------------------------------------------------- bake options
def _size(text):
    from thickbake.settings import parse_size

    try:
        return parse_size(text)
    except ThickbakeError as exc:
        raise argparse.ArgumentTypeError(exc.one_line()) from None


def _pad(text):
    if text == "fill":
        return "fill"
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number of texels or 'fill'") from None
    if value < 0:
        raise argparse.ArgumentTypeError("padding must be ≥ 0 texels")
    return value


BAKE_OPTION_NAMES = ("size", "rays", "cone", "lobe", "measure", "reach", "attenuation_distance", "invert",
                     "supersample", "pad", "bits", "seed", "threads", "bias", "sequence", "target_error",
                     "chunk_rays", "order")


def add_bake_options(parser: argparse.ArgumentParser, size_default: str = "1024", rays_default: str = "64") -> None:
    """Options that become :class:`BakeSettings` fields (defaults stay None = "not given").

    ``size_default``/``rays_default`` are only the help text: commands such as verify that bake with
    their own defaults say so.
    """
    g = parser.add_argument_group("bake options (lengths in scene units)")
    g.add_argument("--size", type=_size, metavar="N|WxH", help=f"map size in texels (default {size_default}; e.g. 2048x1024)")
    g.add_argument("--rays", type=int, metavar="N",
                   help=f"rays per surface sample (default {rays_default}; the cap with --target-error)")
    g.add_argument("--cone", type=float, metavar="DEG",
                   help="half-angle of the cone around the inward normal: 0 = straight in (one ray), 90 = hemisphere (default 90)")
    g.add_argument("--lobe", choices=("cosine", "uniform"), help="direction density in the cone (default cosine)")
    g.add_argument("--measure", choices=("thickness", "transmittance", "occlusion"),
                   help="thickness: mean chord in scene units (default); transmittance: mean exp(-d/L); "
                        "occlusion: fraction of rays hitting within --reach")
    g.add_argument("--reach", type=float, metavar="D",
                   help="longest ray; misses count as D (default: bounding-box diagonal, or a quarter of it for occlusion)")
    g.add_argument("--attenuation-distance", type=float, metavar="L",
                   help="Beer-Lambert distance for transmittance, as glTF attenuationDistance (default: diagonal / 10)")
    g.add_argument("--invert", action="store_const", const=True, help="store 1 - value (bright = thin)")
    g.add_argument("--supersample", type=int, metavar="K", help="K x K surface samples per texel (default 1; cost x K²)")
    g.add_argument("--pad", type=_pad, metavar="N|fill",
                   help="seam padding in texels, or 'fill' for every empty texel (default max(2, size/256))")
    g.add_argument("--bits", type=int, choices=(8, 16), help="PNG bit depth (default 16)")
    g.add_argument("--seed", type=int, metavar="S", help="random seed; the same seed gives the same map (default 0)")
    g.add_argument("--threads", type=int, metavar="N", help="worker threads (default: all cores)")
    g.add_argument("--bias", type=float, metavar="B", help="inward start offset (default 1e-4 x bounding-box diagonal)")
    g.add_argument("--sequence", choices=("sobol", "random"),
                   help="direction sequence: scrambled Sobol with per-sample rotation (default) or independent random")
    g.add_argument("--target-error", type=float, metavar="E",
                   help="adaptive: stop adding rays to a sample once its standard error is at most E (measure units)")
    g.add_argument("--chunk-rays", type=int, metavar="N",
                   help="tuning: rays per work item of the thread pool (default 262144; bounds memory, no effect on the map)")
    g.add_argument("--order", choices=("morton", "rows"),
                   help="tuning: texel order within a work item, Z order (default) or rows; no effect on the map")


def bake_options_from_args(args: argparse.Namespace) -> dict:
    """The bake options the user gave, as a dict of BakeSettings fields."""
    return {name: getattr(args, name) for name in BAKE_OPTION_NAMES if getattr(args, name, None) is not None}


def settings_from_args(args: argparse.Namespace):
    from thickbake.settings import BakeSettings

    return BakeSettings.from_mapping(bake_options_from_args(args), where="command-line options")


# ---------------------------------------------------------------------------- progress
class ProgressBar:
    """A one-line progress bar on stderr, shown only on a terminal and only after one second."""

    def __init__(self, label: str, stream=None, delay: float = 1.0, enabled: bool | None = None):
        self.label = label
        self.stream = stream or sys.stderr
        self.delay = delay
        self.start = time.perf_counter()
        self.enabled = self.stream.isatty() if enabled is None else enabled
        self.shown = False
        self._last = 0.0

    def __call__(self, fraction: float, rays: int = 0, note: str = "") -> None:
        now = time.perf_counter()
        elapsed = now - self.start
        if not self.enabled or elapsed < self.delay or (now - self._last < 0.1 and fraction < 1):
            return
        self._last = now
        width = 28
        filled = int(round(width * min(max(fraction, 0.0), 1.0)))
        eta = elapsed * (1 - fraction) / fraction if fraction > 0 else float("nan")
        rate = f" {rays / elapsed / 1e6:.2f}M rays/s" if rays else ""
        text = f"\r{self.label} [{'#' * filled}{'.' * (width - filled)}] {fraction:6.1%}{rate} ETA {_fmt_seconds(eta)}{note}"
        self.stream.write(text.ljust(100)[:120])
        self.stream.flush()
        self.shown = True

    def close(self) -> None:
        if self.shown:
            self.stream.write("\r" + " " * 120 + "\r")
            self.stream.flush()


def _fmt_seconds(seconds: float) -> str:
    if seconds != seconds:  # NaN
        return "--:--"
    seconds = int(round(seconds))
    return f"{seconds // 60:02d}:{seconds % 60:02d}" if seconds < 3600 else f"{seconds // 3600}h{seconds % 3600 // 60:02d}m"


def print_warnings(warnings, where: str) -> None:
    for text in warnings:
        print(f"thickbake: warning: {where}: {text}", file=sys.stderr)


def summary_line(result, source: str, out: str) -> str:
    info = result.info
    w, h = info["size"]
    units = " scene units" if info["measure"] == "thickness" else ""
    st = info["stats"]
    extra = ""
    if info["overlap"] > 0:
        extra += f", {info['overlap']:.1%} of texels on overlapping UVs"
    if info["miss_fraction"] > 0:
        extra += f", {info['miss_fraction']:.2%} of rays escaped"
    return (f"{source} -> {out}: {w}x{h}, {int(result.covered.sum()):,} texels ({info['coverage']:.1%} covered{extra}), "
            f"{info['rays_traced']:,} rays at {info['rays_per_second'] / 1e6:.2f}M rays/s in {info['seconds']:.1f} s; "
            f"{info['measure']} min {st['min']:.4g} mean {st['mean']:.4g} max {st['max']:.4g}{units}")


# ---------------------------------------------------------------------------- commands
def cmd_bake(args) -> int:
    from thickbake.pipeline.driver import bake
    from thickbake.pipeline.load import load_asset
    from thickbake.maps.files import check_output_path

    settings = settings_from_args(args)
    check_output_path(args.output, args.error_out)
    asset = load_asset(args.mesh)
    print_warnings(asset.report.warnings, args.mesh)
    bar = ProgressBar(f"baking {os.path.basename(args.mesh)}", enabled=None if not args.quiet else False)
    try:
        result = bake(asset, settings, progress=bar)
    finally:
        bar.close()
    result.write(args.output, error_out=args.error_out)
    print_warnings(result.info["warnings"], args.mesh)
    if not args.quiet:
        print(summary_line(result, args.mesh, args.output))
    return EXIT_OK


def cmd_shapes(args) -> int:
    from thickbake.checks.shapes import write_shape_set

    paths = write_shape_set(args.outdir)
    print(f"wrote {len(paths)} files to {args.outdir}")
    return EXIT_OK


def cmd_verify(args) -> int:
    from thickbake.checks import verify

    return verify.run_from_args(args)


def cmd_compare(args) -> int:
    from thickbake.checks import compare

    return compare.run_from_args(args)


def cmd_batch(args) -> int:
    from thickbake.batch import plan as batch

    return batch.run_from_args(args)


def build_parser() -> argparse.ArgumentParser:
    from thickbake.version import __version__

    parser = _Parser(prog="thickbake", description="Bake thickness maps for real-time translucency (CPU ray casting).")
    parser.add_argument("--version", action="version", version=f"thickbake {__version__}")
    parser.add_argument("--debug", action="store_true", help="show a traceback on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser("bake", help="bake one mesh into a map and its JSON sidecar",
                       description="Bake one UV-mapped mesh into a thickness map (PNG 16/8-bit or float TIFF) plus OUT.json.")
    p.add_argument("mesh", metavar="MESH", help="OBJ, glTF/GLB or PLY file with UVs")
    p.add_argument("-o", "--output", required=True, metavar="OUT", help="OUT.png (encoded, see the sidecar) or OUT.tif (float32 measure)")
    p.add_argument("--error-out", metavar="FILE.tif", help="also write the per-texel standard error as a float TIFF")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress bar or summary")
    add_bake_options(p)
    p.set_defaults(func=cmd_bake)

    p = sub.add_parser("shapes", help="write the analytic test shapes (OBJ + GLB) and expected.json",
                       description="Write UV-mapped solids whose thickness is known in closed form, plus expected.json.")
    p.add_argument("outdir", metavar="OUTDIR")
    p.set_defaults(func=cmd_shapes)

    p = sub.add_parser("verify", help="check settings against closed forms, or check an asset for baking",
                       description="Without MESH: bake every analytic shape (sphere, torus, box, capped_cylinder, "
                                   "hollow_shell, l_block) with the given options - defaults --size 256 --rays 64, the "
                                   "rest as for bake - and compare texel by texel with closed forms (sphere: any cone, "
                                   "lobe and measure; the others along the normal with --cone 0) and with Cauchy's mean "
                                   "chord 4V/S (cone 90, cosine, thickness). With MESH: check the asset is fit for "
                                   "baking (closed, faces outward, no intersecting parts, UV coverage/overlap/density, "
                                   "mean chord). Exit 1 if a check fails.")
    p.add_argument("mesh", metavar="MESH", nargs="?", help="your asset (omit to verify against the analytic shapes)")
    p.add_argument("--json", metavar="FILE", help="also write the table as JSON")
    p.add_argument("--shapes", metavar="NAMES", help="comma-separated subset of the analytic shapes")
    add_bake_options(p, size_default="256", rays_default="64")
    p.set_defaults(func=cmd_verify)

    p = sub.add_parser("compare", help="compare two maps in scene units through their sidecars",
                       description="Decode two maps through their sidecars and report their difference; exit 1 beyond --tolerance.")
    p.add_argument("a", metavar="A")
    p.add_argument("b", metavar="B")
    p.add_argument("-o", "--output", metavar="DIFF.png", help="write a signed difference image with a legend")
    p.add_argument("--tolerance", type=float, metavar="T",
                   help="largest allowed absolute difference in measure units (default: one 8-bit code step of the coarser map)")
    p.add_argument("--max-share", type=float, default=0.0, metavar="F",
                   help="share of texels allowed beyond the tolerance before failing (default 0)")
    p.set_defaults(func=cmd_compare)

    p = sub.add_parser("batch", help="bake every mesh under a folder (rules file, parallel, incremental)",
                       description="Bake every .obj/.glb/.gltf/.ply under SRC into OUT, mirroring folders.")
    p.add_argument("src", metavar="SRC")
    p.add_argument("-o", "--output", required=True, metavar="OUT")
    p.add_argument("--config", metavar="FILE", help="rules file (default SRC/thickbake.toml when present)")
    p.add_argument("--jobs", type=int, metavar="N", help="assets baked at once (default: cores, at most the asset count)")
    p.add_argument("--force", action="store_true", help="bake even assets whose outputs are up to date")
    p.add_argument("--dry-run", action="store_true", help="print resolved settings and what would be baked or skipped")
    p.add_argument("--cluster", metavar="ADDRESS", help="dask.distributed scheduler, e.g. tcp://10.0.0.5:8786")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_batch)
    return parser


def main(argv=None) -> int:
    """Entry point of ``thickbake`` and ``python -m thickbake``; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    try:
        return args.func(args)
    except ThickbakeError as exc:
        if args.debug:
            raise
        print(f"thickbake: error: {exc.one_line()}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print("thickbake: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into e.g. `head`, which stopped reading
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
