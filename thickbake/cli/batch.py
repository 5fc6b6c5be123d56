"""``thickbake batch``: every mesh under a folder, by a rules file, in parallel and incrementally."""

from __future__ import annotations

import sys

from thickbake.cli.output import EXIT_FAILED, EXIT_OK, echo, error, one_line, print_warnings, strict_failure, verbose_lines
from thickbake.errors import ThickbakeError

EXAMPLES = """examples:
  thickbake batch samples/ -o out/                 bake every asset; samples/thickbake.toml holds the rules
  thickbake batch assets/ -o maps/ --dry-run -v    what would be baked, why, and with which settings
  thickbake batch assets/ -o maps/ --cluster tcp://10.0.0.5:8786
  thickbake batch samples/ -o out/ --previews      report.html with back-lit stills and viewer pages"""


def add_parser(sub, common) -> None:
    p = sub.add_parser("batch", parents=[common], help="bake every mesh under a folder (rules file, parallel, incremental)",
                       description="Bake every .obj/.glb/.gltf/.ply under SRC into OUT, mirroring folders; "
                                   "writes OUT/report.json and OUT/report.html.", epilog=EXAMPLES)
    p.add_argument("src", metavar="SRC", help="folder of assets, searched recursively")
    p.add_argument("-o", "--output", required=True, metavar="OUT",
                   help="folder for the maps, sidecars and reports (mirrors SRC's folders)")
    p.add_argument("--config", metavar="FILE", help="rules file (default SRC/thickbake.toml when present)")
    p.add_argument("--jobs", type=int, metavar="N", help="assets baked at once (default: cores, at most the asset count)")
    p.add_argument("--force", action="store_true", help="bake even assets whose outputs are up to date")
    p.add_argument("--dry-run", action="store_true", help="print what would be baked or skipped and why; write nothing")
    p.add_argument("--cluster", metavar="ADDRESS", help="dask.distributed scheduler, e.g. tcp://10.0.0.5:8786")
    p.add_argument("--strict", action="store_true",
                   help="treat every warning in the report (skipped assets' included) as a failure: exit 1")
    p.add_argument("--previews", action="store_true",
                   help="also write each asset's back-lit viewer page beside its map and a still of it into "
                        "report.html (headless Chromium; a few seconds per asset)")
    p.set_defaults(func=run)


def run(args) -> int:
    from thickbake.batch.plan import plan_batch
    from thickbake.batch.schedule import run_batch
    from thickbake.cli.progress import ProgressBar

    if args.jobs is not None and args.jobs < 1:
        raise ThickbakeError(f"--jobs {args.jobs} is not allowed", fix="give a whole number of assets to bake at once, at least 1")
    if args.dry_run:
        plan = plan_batch(args.src, args.output, args.config, args.force)
        for rule in plan.unused_rules:
            print_warnings([f"{rule.label()} matches no asset"], str(plan.rules.path))
        for text in plan.warnings:
            print(f"thickbake: warning: {one_line(text)}", file=sys.stderr)
        if not args.quiet:  # -q: nothing on stdout, as for every command; warnings went to stderr above
            for line in format_plan(plan):
                echo(line)
        return EXIT_OK

    bar = ProgressBar("batch", enabled=False if args.quiet else None)

    def notify(text: str) -> None:
        bar.close()
        print(f"thickbake: {one_line(text)}", file=sys.stderr)

    try:
        outcome = run_batch(args.src, args.output, args.config, jobs=args.jobs, force=args.force,
                            cluster=args.cluster, progress=bar, notify=notify, previews=args.previews)
    finally:
        bar.close()
    if args.verbose:
        verbose_lines(format_plan(outcome.plan)[:-1])
    if not args.quiet:
        echo(summary_line(outcome))
    if outcome.report_error:
        error(outcome.report_error)
    warnings = outcome.report["totals"].get("warnings", 0) if outcome.report else 0
    if args.strict and warnings and outcome.exit_code == EXIT_OK:
        strict_failure(warnings)
        return EXIT_FAILED
    return outcome.exit_code


# ---------------------------------------------------------------------------- what is printed
def format_plan(plan) -> list[str]:
    """Lines of ``--dry-run``: per asset what would happen, why, and its resolved settings."""
    lines = []
    for job in plan.jobs:
        lines += _asset_lines(job)
    to_bake = len(plan.to_bake())
    skipped = sum(1 for j in plan.jobs if j.status == "skipped")
    failed = sum(1 for j in plan.jobs if j.status == "failed")
    lines.append(f"dry run: {len(plan.jobs)} assets under {plan.src}: {to_bake} would be baked, {skipped} skipped"
                 + (f", {failed} would fail" if failed else "") + "; nothing was written")
    return lines


def _asset_lines(job) -> list[str]:
    """What will happen to one asset and why, then its resolved settings (and its transfer)."""
    from thickbake.settings import settings_from_mapping

    asset, maps = job.asset, job.result.maps
    action = {"bake": "bake", "skipped": "skip", "failed": "fail"}.get(job.status, job.status)
    # an up-to-date asset of several maps (materials, tiles) lists them all; before a bake the
    # mesh is not loaded, so only the single-map name is known
    target = ", ".join(m["map"] for m in maps) if len(maps) > 1 else asset.map_rel
    if job.status == "failed":
        lines = [f"{asset.rel} -> {target}: {action}" + (f" ({job.reason})" if job.reason else "")
                 + f": {job.result.error}"]
    else:
        lines = [f"{asset.rel} -> {target}: {action} ({job.reason})"]
    content, run = settings_from_mapping(asset.options.settings)
    settings = {**content.to_dict(), **run.to_dict()}
    shown = " ".join(f"{k}={_setting_text(k, v)}" for k, v in settings.items())
    rules = ", ".join(f"#{n}" for n in asset.options.rules) or "none"
    lines.append(f"    format={asset.options.format} {shown}  [rules: {rules}]")
    if asset.transfer:
        how = (f"cage {asset.transfer['cage']}" if asset.transfer.get("cage") else
               f"search distance {asset.transfer['search_distance'] or 'default'}")
        lines.append(f"    measured in {', '.join(asset.transfer['source'])} ({how})")
    return lines


def _setting_text(key: str, value) -> str:
    if value is None:
        return "off" if key == "target_error" else "auto"
    if key == "size":
        return f"{value[0]}x{value[1]}"
    if isinstance(value, bool):
        return str(value).lower()
    return str(value)


def summary_line(outcome) -> str:
    """The last line a batch prints on stdout."""
    totals = outcome.report["totals"]
    parts = [f"{totals['baked']} baked", f"{totals['skipped']} skipped", f"{totals['failed']} failed"]
    if totals["not_started"]:
        parts.append(f"{totals['not_started']} not started (interrupted)")
    extra = ""
    if totals.get("maps", 0) > totals["baked"] + totals["skipped"]:
        extra += f" ({totals['maps']} maps)"
    if totals.get("warnings"):
        extra += f", {totals['warnings']} warning{'s' if totals['warnings'] != 1 else ''} (see the report)"
    how = ""
    if outcome.jobs_used:
        how = f", {outcome.jobs_used} job{'s' if outcome.jobs_used != 1 else ''}"
        if outcome.threads:
            how += f" x {outcome.threads} thread{'s' if outcome.threads != 1 else ''}"
        else:
            how += " on the cluster"
    report = f"report {outcome.plan.out / 'report.html'}" if outcome.report_error is None else "no report (see the error)"
    return f"batch: {', '.join(parts)} of {totals['assets']} assets{extra} in {outcome.seconds:.1f} s{how}; {report}"
