"""File names of maps: one naming scheme for ``bake`` and ``batch``.

An asset bakes into one map per (material, UV set, UDIM tile).  Its maps are named from these
placeholders, in this order, by default:

``{stem}``      the mesh file's name without its suffix (``car`` for ``car.glb``)
``{material}``  the material's name (characters other than letters, digits, ``-`` and ``_`` become
                ``_``), its index when unnamed, ``nomaterial`` for faces without one
``{uvset}``     ``uv1``, ``uv2`` … (empty for UV set 0)
``{tile}``      the UDIM tile number, ``1001`` … (empty when the layout stays in the 0–1 square)
``{measure}``   ``thickness``, ``transmittance`` or ``occlusion``

Default name: the non-empty parts of ``{stem}.{material}.{uvset}.{tile}.{measure}.png``, where the
material is left out when the asset has only one material — so a single-material asset whose UVs
stay in the 0–1 square keeps ``STEM.MEASURE.png``.  Names sort by asset, then material, then tile.

``-o`` of ``thickbake bake`` may be

* a file name (``maps/car.png``): used as is for a single map; for several maps each map's label
  (material, UV set, tile) is inserted before the suffix (``maps/car.body.png``);
* a folder (an existing one, or a name ending in ``/``): the default names inside it;
* a pattern with placeholders (``maps/{stem}_{material}_{tile}.tif``): empty placeholders and the
  separators before them are dropped (``car_body.tif`` for a map without a tile).
"""

from __future__ import annotations

import os
import re
from pathlib import Path

from thickbake.errors import ThickbakeError

PLACEHOLDERS = ("stem", "material", "uvset", "tile", "measure")
_FIELD = re.compile(r"\{([^{}]*)\}")
_UNSAFE = re.compile(r"[^A-Za-z0-9_\-]+")


def stem_of(mesh: str | os.PathLike) -> str:
    """File name without its last suffix (``a/b/car.glb`` → ``car``)."""
    path = Path(mesh)
    return path.name[: -len(path.suffix)] if path.suffix else path.name


def material_labels(keys: list[dict]) -> list[str]:
    """File-name-safe, distinct material labels for map keys (``material``, ``material_index``).

    A name is kept with unsafe characters replaced; an unnamed material gets its index; faces without
    a material get ``nomaterial``.  Two materials whose safe names collide get their index appended.
    """
    raw = []
    for key in keys:
        material = key.get("material")
        if material is None:
            raw.append("nomaterial")
        else:
            raw.append(_UNSAFE.sub("_", str(material)).strip("_") or f"material{key.get('material_index')}")
    owners: dict[str, set] = {}
    for label, key in zip(raw, keys):
        owners.setdefault(label, set()).add(key.get("material_index"))
    return [f"{label}-{key.get('material_index')}" if len(owners[label]) > 1 else label
            for label, key in zip(raw, keys)]


def name_fields(stem: str, measure: str, keys: list[dict]) -> list[dict]:
    """The placeholder values of each map of one asset (see the module docstring)."""
    labels = material_labels(keys)
    several = len(set(labels)) > 1
    return [{"stem": stem, "material": label if several else "", "material_always": label,
             "uvset": f"uv{key['uv_set']}" if key.get("uv_set") else "",
             "tile": str(key["tile"]) if key.get("tile") is not None else "", "measure": measure}
            for label, key in zip(labels, keys)]


def default_name(fields: dict, suffix: str = ".png") -> str:
    """``STEM[.MATERIAL][.uvN][.TILE].MEASURE`` + suffix."""
    parts = [fields["stem"], fields["material"], fields["uvset"], fields["tile"], fields["measure"]]
    return ".".join(p for p in parts if p) + suffix


def label(fields: dict) -> str:
    """What tells one map of an asset from another: ``MATERIAL[.uvN][.TILE]`` (non-empty parts)."""
    return ".".join(p for p in (fields["material"], fields["uvset"], fields["tile"]) if p)


def is_pattern(text: str) -> bool:
    return bool(_FIELD.search(text))


def render(pattern: str, fields: dict) -> str:
    """Fill a pattern's placeholders; an empty one drops itself and the separator before it.

    ``{material}`` always holds the material's label in a pattern (a user who names it wants it).
    """
    unknown = [name for name in _FIELD.findall(pattern) if name not in PLACEHOLDERS]
    if unknown:
        raise ThickbakeError(f"unknown placeholder {{{unknown[0]}}} in the output pattern {pattern!r}",
                             fix=f"use {', '.join('{' + p + '}' for p in PLACEHOLDERS)}")
    values = dict(fields, material=fields.get("material_always", fields["material"]))

    def fill(match: re.Match) -> str:
        return values[match.group(1)]

    # drop a separator directly before an empty placeholder: "a.{tile}.png" → "a.png"
    text = re.sub(r"[._\-]?\{(" + "|".join(PLACEHOLDERS) + r")\}",
                  lambda m: "" if not values[m.group(1)] else m.group(0), pattern)
    return _FIELD.sub(fill, text)


def output_paths(output: str | None, mesh: str | os.PathLike, measure: str, keys: list[dict]) -> list[Path]:
    """Where ``thickbake bake`` writes each map of an asset (``keys``: the maps' ``map_of`` plus
    ``material_index``), following the rules of the module docstring.

    Raises
    ------
    ThickbakeError
        Two maps would get the same name (a pattern without ``{material}``/``{tile}``).
    """
    fields = name_fields(stem_of(mesh), measure, keys)
    if output is None:
        folder = Path(mesh).parent
        paths = [folder / default_name(f) for f in fields]
    elif is_pattern(output):
        paths = [Path(render(output, f)) for f in fields]
    elif output.endswith(("/", os.sep)) or Path(output).is_dir():
        paths = [Path(output) / default_name(f) for f in fields]
    elif len(fields) == 1:
        paths = [Path(output)]
    else:
        base = Path(output)
        paths = [base.with_name(f"{base.stem}.{label(f)}{base.suffix}") for f in fields]
    if len(set(paths)) != len(paths):
        raise ThickbakeError(f"the asset makes {len(keys)} maps, and {output!r} gives some of them the same name",
                             path=mesh, fix="put {material}, {uvset} and {tile} in the output pattern, or give a folder")
    return paths


__all__ = ["PLACEHOLDERS", "stem_of", "material_labels", "name_fields", "default_name", "label", "render",
           "is_pattern", "output_paths"]
