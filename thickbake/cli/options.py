"""Command-line options that become :class:`~thickbake.settings.BakeSettings` and
:class:`~thickbake.settings.RunOptions` fields.

Every bake option defaults to None ("not given"), so a command can merge the options a user typed
over its own defaults or a rules file's.  Parsing happens here once; the library only ever sees the
validated settings object.
"""

from __future__ import annotations

import argparse

from thickbake.errors import ThickbakeError


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


def _reach(text):
    from thickbake.settings import parse_reach

    try:
        return parse_reach(text)
    except ThickbakeError as exc:
        raise argparse.ArgumentTypeError(exc.one_line()) from None


BAKE_OPTION_NAMES = ("size", "rays", "cone", "lobe", "measure", "reach", "attenuation_distance", "invert",
                     "supersample", "pad", "bits", "seed", "threads", "bias", "sequence", "target_error",
                     "chunk_rays", "order", "medium", "scene_unit", "uv_set", "blockers")  # map content and run options (OPTION_KEYS)


def add_bake_options(parser: argparse.ArgumentParser, size_default: str = "1024", rays_default: str = "64") -> None:
    """Options that become :class:`BakeSettings` fields (defaults stay None = "not given").

    ``size_default``/``rays_default`` are only the help text: commands such as verify that bake with
    their own defaults say so.
    """
    from thickbake.lobes import LOBES
    from thickbake.measures import MEASURES

    g = parser.add_argument_group("bake options (lengths in scene units)")
    g.add_argument("--size", type=_size, metavar="N|WxH", help=f"map size in texels (default {size_default}; e.g. 2048x1024)")
    g.add_argument("--rays", type=int, metavar="N",
                   help=f"rays per surface sample (default {rays_default}; the cap with --target-error)")
    g.add_argument("--cone", type=float, metavar="DEG",
                   help="half-angle of the cone around the inward normal: 0 = straight in (one ray), 90 = hemisphere (default 90)")
    g.add_argument("--lobe", choices=tuple(LOBES), help="direction density in the cone (default cosine)")
    g.add_argument("--measure", choices=tuple(MEASURES),
                   help="thickness: mean chord in scene units (default); transmittance: mean exp(-d/L); "
                        "occlusion: fraction of rays hitting within --reach")
    g.add_argument("--reach", type=_reach, metavar="D|N%|fit",
                   help="longest ray; misses count as D (default: bounding-box diagonal, or a quarter of it for occlusion); "
                        "N%% = that share of the diagonal; fit = encode thickness up to the 99.5th percentile of the "
                        "texels, so the map uses its whole code range")
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
                   help="direction sequence: scrambled Sobol, 4 independently rotated replicates per sample (default), or independent random")
    g.add_argument("--target-error", type=float, metavar="E",
                   help="adaptive: stop adding rays to a sample once its standard error is at most E (measure units)")
    g.add_argument("--medium", metavar="NAME|list",
                   help="measured medium (Jensen et al. 2001: marble, skin1, wholemilk, ...): the map becomes the RGB "
                        "transmittance exp(-sigma_tr d) through the baked thickness; 'list' prints the presets")
    g.add_argument("--scene-unit", metavar="LENGTH",
                   help="length of one scene unit for --medium, e.g. 1cm, 1m, 25.4mm (default 1m for glTF; "
                        "required for other formats)")
    g.add_argument("--uv-set", type=int, metavar="N",
                   help="UV channel the maps follow (glTF TEXCOORD_N; default 0)")
    g.add_argument("--blockers", metavar="all|own|NAME,...",
                   help="what blocks a texel's rays: every part (all, default), only the part the texel lies on "
                        "(own: glTF node/primitive, OBJ object/group), or the named parts or materials (plus the "
                        "texel's own part)")
    g.add_argument("--chunk-rays", type=int, metavar="N",
                   help="tuning: rays per work item of the thread pool (default 262144; bounds memory, no effect on the map)")
    g.add_argument("--order", choices=("morton", "rows"),
                   help="tuning: texel order within a work item, Z order (default) or rows; no effect on the map")


def add_transfer_options(parser: argparse.ArgumentParser, mask: bool = False) -> None:
    """``--from SOURCE...``, ``--cage-mesh``, ``--search-distance`` (and ``--unprojected-mask`` for bake)."""
    g = parser.add_argument_group("measuring in a source solid (the map goes to MESH's UVs)")
    g.add_argument("--from", dest="source", nargs="+", metavar="SOURCE",
                   help="measure the thickness in these solids (e.g. the detailed sculpt or a closed proxy; "
                        "no UVs needed) instead of in MESH; put MESH before --from")
    g.add_argument("--search-distance", type=float, metavar="D",
                   help="how far from MESH's surface, outwards and inwards along its normal, to look for the "
                        "source (default 5%% of MESH's bounding-box diagonal)")
    g.add_argument("--cage-mesh", metavar="CAGE",
                   help="search from this mesh's matching point through MESH's instead (same triangles as MESH, "
                        "usually MESH pushed outwards)")
    if mask:
        g.add_argument("--unprojected-mask", metavar="FILE.png",
                       help="also write an 8-bit mask, white on texels that found no source point")


def transfer_from_args(args: argparse.Namespace) -> dict:
    """Keyword arguments of :func:`thickbake.pipeline.driver.bake` for a transfer (empty without --from)."""
    source = getattr(args, "source", None)
    cage = getattr(args, "cage_mesh", None)
    distance = getattr(args, "search_distance", None)
    if not source:
        given = [flag for flag, value in (("--cage-mesh", cage), ("--search-distance", distance),
                                          ("--unprojected-mask", getattr(args, "unprojected_mask", None)))
                 if value is not None]
        if given:
            verb = "needs" if len(given) == 1 else "need"
            raise ThickbakeError(f"{' and '.join(given)} {verb} a source solid", fix="add --from SOURCE")
        return {}
    if cage is not None and distance is not None:
        raise ThickbakeError("--cage-mesh and --search-distance were both given",
                             fix="give one: the cage sets the search distance at every point")
    if distance is not None and not distance > 0:
        raise ThickbakeError(f"--search-distance {distance:g} is not allowed", fix="give a positive distance in scene units")
    return {"source": list(source), "cage": cage, "search_distance": distance}


def bake_options_from_args(args: argparse.Namespace) -> dict:
    """The bake options the user gave, as a flat dict of BakeSettings and RunOptions fields."""
    return {name: getattr(args, name) for name in BAKE_OPTION_NAMES if getattr(args, name, None) is not None}


def settings_from_args(args: argparse.Namespace):
    """(BakeSettings, RunOptions) of the options the user gave, validated once."""
    from thickbake.settings import settings_from_mapping

    return settings_from_mapping(bake_options_from_args(args), where="command-line options")
