"""``thickbake compare``: two maps decoded through their sidecars, and their difference."""

from __future__ import annotations

from pathlib import Path

from thickbake.cli.output import EXIT_FAILED, EXIT_OK, echo, verbose_lines, write_json
from thickbake.errors import ThickbakeError

EXAMPLES = """examples:
  thickbake compare old/leaf.thickness.png new/leaf.thickness.png
  thickbake compare a.png b.tif --tolerance 0.01 --max-share 0.001 -o diff.png
  thickbake compare a.png b.png --json -            the figures as JSON on stdout"""


def add_parser(sub, common) -> None:
    p = sub.add_parser("compare", parents=[common], help="compare two maps in scene units through their sidecars",
                       description="Decode two maps through their sidecars and report their difference; "
                                   "exit 1 beyond --tolerance.", epilog=EXAMPLES)
    p.add_argument("a", metavar="A", help="first map (PNG or TIFF with its .json sidecar beside it)")
    p.add_argument("b", metavar="B", help="second map, the same size and measure as A")
    p.add_argument("-o", "--output", metavar="DIFF.png", help="write a signed difference image with a legend")
    p.add_argument("--tolerance", type=float, metavar="T",
                   help="largest allowed absolute difference in measure units (default: one 8-bit code step of the coarser map)")
    p.add_argument("--max-share", type=float, default=0.0, metavar="F",
                   help="share of texels allowed beyond the tolerance before failing (default 0)")
    p.add_argument("--json", metavar="FILE", help="also write the figures as JSON; '-' writes only the JSON, to stdout")
    p.set_defaults(func=run)


def run(args) -> int:
    from thickbake.checks.compare import compare_maps, difference_image_bytes, format_report, load_map
    from thickbake.maps.files import atomic_write_bytes

    max_share = float(args.max_share or 0.0)
    if not (0.0 <= max_share <= 1.0):
        raise ThickbakeError(f"--max-share {max_share:g} must be a share from 0 to 1", fix="e.g. --max-share 0.01")
    out = args.output
    if out is not None:
        out_path = Path(out)
        if out_path.suffix.lower() != ".png":
            raise ThickbakeError("the difference image must be a PNG", path=out_path, fix="name it DIFF.png")
        if out_path.is_dir():
            raise ThickbakeError("the output is a folder", path=out_path, fix="give a file name such as diff.png")
    if args.json not in (None, "-") and Path(args.json).is_dir():
        raise ThickbakeError("the --json output is a folder", path=args.json, fix="give a file name such as compare.json")
    comparison = compare_maps(load_map(args.a), load_map(args.b), args.tolerance)
    passed = comparison.share_beyond <= max_share
    to_stdout = args.json != "-" and not args.quiet
    if to_stdout:
        for line in format_report(comparison, max_share):
            echo(line)
    if out is not None:
        atomic_write_bytes(out, difference_image_bytes(comparison))
        if to_stdout:
            echo(f"  difference image      {out}")
    if args.verbose:
        verbose_lines([f"A decodes as {comparison.a.kind}, B as {comparison.b.kind}"])
    if args.json is not None:
        data = comparison.to_dict()
        data["max_share"] = max_share
        data["passed"] = passed
        write_json(args.json, data)
    return EXIT_OK if passed else EXIT_FAILED
