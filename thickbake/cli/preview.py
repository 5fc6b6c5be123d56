"""``thickbake preview``: a self-contained viewer page of an asset lit from behind through its maps, and a still."""

from __future__ import annotations

from pathlib import Path

from thickbake.cli.output import EXIT_FAILED, EXIT_OK, echo, print_warnings, verbose_lines, write_json
from thickbake.errors import ThickbakeError

EXAMPLES = """examples:
  thickbake preview samples/candle.glb samples/candle.thickness.png -o candle.html
  thickbake preview leaf.obj leaf.thickness.json --png leaf.png       a still, light straight behind
  thickbake preview chair.glb maps/*.json -o chair.html                one map per material / UV set / tile"""


def add_parser(sub, common) -> None:
    p = sub.add_parser("preview", parents=[common], help="a viewer page (and a still) of the asset lit from behind",
                       description="Write a self-contained HTML page that shows the asset lit from behind, the light "
                                   "that crosses it dimmed by the thickness each map's sidecar decodes and leaving it "
                                   "in a Henyey-Greenstein lobe; optionally render a still with headless "
                                   "Chromium.", epilog=EXAMPLES)
    p.add_argument("asset", metavar="ASSET", help="the mesh the maps were baked from")
    p.add_argument("maps", metavar="MAP", nargs="*",
                   help="maps or their .json sidecars (default: ASSET's thickness map beside it, as 'bake' names it)")
    p.add_argument("-o", "--output", metavar="VIEW.html", help="the viewer page (default: ASSET.view.html beside the "
                                                               "first map, unless only --png is asked for)")
    p.add_argument("--png", metavar="OUT.png", help="also render a still with the light straight behind the asset")
    p.add_argument("--size", default="960x720", metavar="WxH", help="pixels of the still (default 960x720)")
    p.add_argument("--attenuation", type=float, metavar="D",
                   help="scene units: a thickness D passes 1/e of the light (default: a quarter of the median thickness)")
    p.add_argument("--view", default="30,20", metavar="AZ,EL",
                   help="camera azimuth and elevation in degrees (default 30,20); the light starts opposite it")
    p.add_argument("--json", metavar="FILE", help="also write what the page holds as JSON; '-' writes only the JSON, to stdout")
    p.set_defaults(func=run)


def _pair(text: str, sep: str, what: str, fix: str) -> tuple[float, float]:
    try:
        a, b = (float(x) for x in text.lower().split(sep))
    except ValueError:
        raise ThickbakeError(f"{what} {text!r} is not two numbers", fix=fix) from None
    return a, b


def run(args) -> int:
    from thickbake.cli.bake import default_output
    from thickbake.preview.page import ViewSettings, build_preview, check_page_path, write_preview

    width, height = _pair(args.size, "x", "--size", "e.g. --size 960x720")
    if not (16 <= width <= 8192 and 16 <= height <= 8192) or width != int(width) or height != int(height):
        raise ThickbakeError(f"--size {args.size} must be whole pixels from 16 to 8192", fix="e.g. --size 960x720")
    az, el = _pair(args.view, ",", "--view", "e.g. --view 30,20")
    if not -90 < el < 90:
        raise ThickbakeError(f"--view elevation {el:g} must lie strictly between -90 and 90", fix="e.g. --view 30,20")
    if args.attenuation is not None and not args.attenuation > 0:
        raise ThickbakeError(f"--attenuation {args.attenuation:g} must be a positive length", fix="e.g. --attenuation 0.01")
    maps = list(args.maps) or [default_output(args.asset, "thickness")]
    if not args.maps and not Path(maps[0]).exists():
        raise ThickbakeError("no map given and none found beside the asset", path=maps[0],
                             fix=f"bake first (thickbake bake {args.asset}) or give the maps after the asset")
    out = args.output
    if out is None and args.png is None:
        out = str(Path(maps[0]).with_name(Path(args.asset).stem + ".view.html"))
    if out is not None:
        check_page_path(out)
    if args.png is not None:
        if Path(args.png).suffix.lower() != ".png" or Path(args.png).is_dir():
            raise ThickbakeError("the still must be a .png file", path=args.png, fix="name it e.g. still.png")
        from thickbake.preview.still import find_chromium
        find_chromium()  # refuse before any work when there is no browser
    settings = ViewSettings(attenuation=args.attenuation, az=az, el=el)
    preview = build_preview(args.asset, maps, settings)
    to_stdout = args.json != "-" and not args.quiet
    if out is not None:
        write_preview(preview, out)
        if to_stdout:
            echo(f"{args.asset} -> {out}: {len(preview.entries)} map{'s' if len(preview.entries) != 1 else ''}, "
                 f"{preview.faces_covered:,} of {preview.faces:,} faces covered, "
                 f"{len(preview.html.encode()) / 1e6:.1f} MB (self-contained)")
    data = preview.to_dict()
    data["page"] = out
    if args.png is not None:
        from thickbake.preview.still import render_still, write_still

        still = render_still(preview.html, int(width), int(height))
        write_still(still, args.png)
        data["still"] = {"png": args.png, "seconds": round(still.seconds, 3), "errors": still.errors}
        if to_stdout:
            echo(f"{args.asset} -> {args.png}: still {int(width)}x{int(height)}, light straight behind, "
                 f"{still.seconds:.1f} s in headless Chromium")
        print_warnings([f"the page reported: {text}" for text in still.errors], args.png)
    print_warnings(preview.warnings, args.asset)
    if args.verbose:
        verbose_lines([f"attenuation distance {preview.settings.attenuation:.6g} scene units",
                       *[f"map {e.label}: {e.measure} ({e.kind}), decode offset {e.offset[0]:.6g} scale "
                         f"{e.scale[0]:.6g} / {e.code_max:g}" for e in preview.entries]])
    if args.json is not None:
        write_json(args.json, data)
    # a page that logged errors drew a still nobody should trust
    return EXIT_FAILED if data.get("still", {}).get("errors") else EXIT_OK
