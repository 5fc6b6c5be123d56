"""``thickbake verify TARGET --from SOURCE``: is a target/source pair fit for a transfer bake?

One bake from the source onto the target's UVs (the user's size, rays, seed, search distance or cage;
cone 90°, cosine lobe, thickness, reach = the source's diagonal), then one table row each:

* **source closed** (per source file): no open or non-manifold edges after welding seams.  A measured
  solid needs an inside; rays leaving through a hole count as the full reach.
* **projection coverage**: the share of the target's texels that found a source point.  Texels that
  found none are left to padding; more than :data:`UNPROJECTED_LIMIT` fails the row.
* **projection distance**: p50, p95 and the largest distance between a target point and its source
  point (scene units; info).  A largest distance near the search distance warns that other points may
  lie just beyond it.
* **inward rays escaping the source**: the share of the bake's rays that hit nothing; more than
  :data:`thickbake.checks.verify.ESCAPE_LIMIT` fails the row (a hole or an inside-out part of the source).
"""

from __future__ import annotations

import time

from thickbake.checks.verify import ESCAPE_LIMIT, FAIL, INFO, PASS, WARN, Check, VerifyReport, _settings, _settings_line

#: Share of the target's texels that may find no source point before the coverage row fails: one in a
#: thousand leaves stray texels along silhouettes to padding, more means a part of the target has no
#: source.  Judgement, no published source.
UNPROJECTED_LIMIT = 1e-3
#: A largest projection distance above this share of the search distance warns (judgement): the
#: distribution reaches the edge of the search, so other points may lie just beyond it.
NEAR_LIMIT_SHARE = 0.9


def verify_transfer(target, source, options: dict | None = None, cage=None,
                    search_distance: float | None = None) -> VerifyReport:
    """Check a target and its source solid(s) for a transfer bake (see the module docstring).

    Parameters
    ----------
    target : path, trimesh object or Asset
        The mesh whose UVs receive the map.
    source : path, trimesh object, Asset or a list of them
    options : dict, optional
        BakeSettings and RunOptions fields; cone, lobe, measure, reach and invert are overridden.
    cage, search_distance
        As for :func:`thickbake.pipeline.driver.bake`.
    """
    from thickbake.pipeline.driver import bake
    from thickbake.pipeline.load import load_asset
    from thickbake.pipeline.transfer import load_source

    start = time.perf_counter()
    asset = load_asset(target)
    solid = load_source(source)
    user, run = _settings(options, "verify options")
    s = user.replace(cone=90.0, lobe="cosine", measure="thickness", reach=None, invert=False,
                     attenuation_distance=None)
    result = bake(asset, s, run, source=solid, cage=cage, search_distance=search_distance)
    info = result.info["transfer"]
    checks: list[Check] = []

    for part in solid.parts:
        rep = part.report
        if rep.watertight:
            checks.append(Check(part.name, "source closed", PASS, measured=0.0, note="no open edges after welding seams"))
        else:
            checks.append(Check(part.name, "source closed", FAIL, measured=float(rep.boundary_edges),
                                note=f"close the source: {rep.boundary_edges:,} open edges "
                                     f"({rep.boundary_length:.4g} scene units), {rep.non_manifold_edges:,} edges shared "
                                     "by more than two faces — rays leaving through holes count as the full reach",
                                figures={"open_edges": rep.boundary_edges, "non_manifold_edges": rep.non_manifold_edges}))

    share = info["unprojected_share"]
    reach_text = ("the cage" if info["mode"] == "cage" else f"the search distance {info['search_distance']:.4g}")
    coverage = Check(asset.name, "projection coverage", PASS if share <= UNPROJECTED_LIMIT else FAIL,
                     expected=1.0, measured=1.0 - share, tolerance=UNPROJECTED_LIMIT,
                     note=f"{info['unprojected_texels']:,} of {info['layout_texels']:,} texels found no source point "
                          f"within {reach_text}",
                     figures={k: info[k] for k in ("layout_texels", "unprojected_texels", "unprojected_share",
                                                     "unprojected_samples", "samples")})
    if coverage.status == FAIL:
        coverage.note += (" — they would be left to padding; raise --search-distance, use --cage-mesh, or add the "
                          "missing part to the source (bake --unprojected-mask shows where)")
    checks.append(coverage)

    spread = info["distance"]
    limit = info["search_distance"]
    status = INFO
    note = f"p50 {spread['p50']:.4g}, p95 {spread['p95']:.4g}, max {spread['max']:.4g} scene units"
    if limit is not None and spread["max"] is not None and spread["max"] > NEAR_LIMIT_SHARE * limit:
        status = WARN
        note += f"; the largest is near the search distance {limit:.4g}: some points may lie just beyond it"
    checks.append(Check(asset.name, "projection distance", status, measured=spread["p50"], p95=spread["p95"],
                        max=spread["max"], note=note, figures=dict(spread)))

    escaped = result.info["miss_fraction"]
    checks.append(Check(", ".join(p.name for p in solid.parts), "rays escaping the source",
                        PASS if escaped <= ESCAPE_LIMIT else FAIL, expected=0.0, measured=escaped,
                        tolerance=ESCAPE_LIMIT,
                        note="" if escaped <= ESCAPE_LIMIT else
                        "inward rays leave the source: close its holes and wind its faces outward "
                        "(thickbake verify SOURCE needs UVs; the rows above name the open edges)"))

    failed = [c for c in checks if c.status == FAIL]
    if failed:
        verdict = "not fit for a transfer bake: " + "; ".join(f"{c.subject}: {c.quantity}" for c in failed)
    else:
        warns = [c.quantity for c in checks if c.status == WARN]
        verdict = "fit for a transfer bake" + (f" (see the warnings: {', '.join(warns)})" if warns else "")
    names = ", ".join(p.name for p in solid.parts)
    header = [f"thickbake verify {asset.name} --from {names}: target {asset.report.faces:,} faces, source "
              f"{len(solid.triangles):,} faces, search by {reach_text}",
              f"checks baked at {_settings_line(result.settings)}"]
    return VerifyReport("transfer", header, checks, result.settings.to_dict(), seconds=time.perf_counter() - start,
                        verdict=verdict)


__all__ = ["verify_transfer", "UNPROJECTED_LIMIT", "NEAR_LIMIT_SHARE"]
