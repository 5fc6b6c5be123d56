"""``thickbake verify``: the analytic shapes against their closed forms, or one asset's fitness."""

from __future__ import annotations

from pathlib import Path

from thickbake.cli.options import add_bake_options, add_transfer_options, bake_options_from_args, transfer_from_args
from thickbake.cli.output import EXIT_FAILED, EXIT_OK, echo, verbose_lines, write_json
from thickbake.errors import ThickbakeError

EXAMPLES = """examples:
  thickbake verify                                  every analytic shape at the default settings
  thickbake verify --cone 30 --lobe uniform --shapes sphere
  thickbake verify samples/candle.glb --json -      an asset's fitness for baking, as JSON on stdout"""


def add_parser(sub, common) -> None:
    p = sub.add_parser("verify", parents=[common], help="check settings against closed forms, or check an asset for baking",
                       description="Without MESH: bake every analytic shape (sphere, torus, box, capped_cylinder, "
                                   "hollow_shell, l_block) with the given options - defaults --size 256 --rays 64, the "
                                   "rest as for bake - and compare texel by texel with closed forms (sphere: any cone, "
                                   "lobe and measure; the others along the normal with --cone 0) and with Cauchy's mean "
                                   "chord 4V/S (cone 90, cosine, thickness). With MESH: check the asset is fit for "
                                   "baking (closed, faces outward, no intersecting parts, UV coverage/overlap/density, "
                                   "mean chord). With MESH --from SOURCE: check the pair for a transfer bake (source "
                                   "closed, share of MESH's texels that find the source, projection distances, rays "
                                   "escaping the source). Exit 1 if a check fails.",
                       epilog=EXAMPLES)
    p.add_argument("mesh", metavar="MESH", nargs="?",
                   help="your asset, to check its fitness for baking (omit to verify against the analytic shapes)")
    p.add_argument("--json", metavar="FILE", help="also write the table as JSON; '-' writes only the JSON, to stdout")
    p.add_argument("--shapes", metavar="NAMES", help="comma-separated subset of the analytic shapes")
    add_bake_options(p, size_default="256", rays_default="64")
    add_transfer_options(p)
    p.set_defaults(func=run)


def run(args) -> int:
    from thickbake.checks.verify import verify_asset, verify_shapes

    json_path = args.json
    if json_path not in (None, "-") and Path(json_path).is_dir():
        raise ThickbakeError("the --json output is a folder", path=json_path, fix="give a file name such as verify.json")
    options = bake_options_from_args(args)
    transfer = transfer_from_args(args)
    if transfer and not args.mesh:
        raise ThickbakeError("--from needs the target mesh", fix="thickbake verify TARGET --from SOURCE")
    if args.mesh:
        if args.shapes:
            raise ThickbakeError("--shapes applies to the analytic shapes, not to a mesh",
                                 fix="drop --shapes, or drop MESH to verify the analytic shapes")
        if transfer:
            from thickbake.checks.transfer_fit import verify_transfer

            report = verify_transfer(args.mesh, options=options, **transfer)
        else:
            report = verify_asset(args.mesh, options)
    else:
        report = verify_shapes(options, args.shapes)
    if json_path != "-" and not args.quiet:
        for line in report.lines():
            echo(line)
        echo(f"({report.seconds:.1f} s)")
    if args.verbose:
        verbose_lines([f"settings: {report.settings}", f"verify took {report.seconds:.1f} s"])
    if json_path is not None:
        write_json(json_path, report.to_dict())
    return EXIT_OK if report.passed else EXIT_FAILED
