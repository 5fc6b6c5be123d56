"""``thickbake shapes``: write the analytic test shapes and their closed forms."""

from __future__ import annotations

from thickbake.cli.output import EXIT_OK, echo

EXAMPLES = """examples:
  thickbake shapes shapes/                 sphere, torus, box ... as OBJ + GLB, plus expected.json
  thickbake bake shapes/sphere.obj --cone 0 && thickbake verify"""


def add_parser(sub, common) -> None:
    p = sub.add_parser("shapes", parents=[common], help="write the analytic test shapes (OBJ + GLB) and expected.json",
                       description="Write UV-mapped solids whose thickness is known in closed form, plus expected.json.",
                       epilog=EXAMPLES)
    p.add_argument("outdir", metavar="OUTDIR", help="folder to write the shapes into (created if missing)")
    p.set_defaults(func=run)


def run(args) -> int:
    from thickbake.checks.shapes import write_shape_set

    paths = write_shape_set(args.outdir)
    if not args.quiet:
        echo(f"wrote {len(paths)} files to {args.outdir}")
    return EXIT_OK
