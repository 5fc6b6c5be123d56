"""Deliver baked maps into the files engines read: a glTF copy with KHR_materials_volume.

:func:`check_volume_request` runs before baking (bad options and unsuitable assets are refused
before any work); :func:`write_gltf_copy` runs after it.  Each map goes to the materials it was baked
for: today one map covers every material on the baked UV set; with per-material maps, pass one
``(result, material indices, uv_set)`` per map.
"""

from __future__ import annotations

import os
from pathlib import Path

from thickbake.errors import ThickbakeError
from thickbake.maps.gltf_volume import (VolumeMap, VolumePlan, check_gltf_output, plan_volume, volume_copy_files,
                                         write_volume_copy)
from thickbake.maps.png import encode_png
from thickbake.settings import BakeSettings


def check_volume_request(source: str | os.PathLike, out: str | os.PathLike, settings: BakeSettings,
                         uv_set: int = 0, transmission: float | None = None) -> VolumePlan:
    """Refuse a glTF write-back that cannot work, before baking; returns the materials' plan."""
    check_gltf_output(source, out)
    if settings.measure != "thickness" or settings.invert:
        raise ThickbakeError(f"a glTF thicknessTexture holds thickness, not {'inverted ' if settings.invert else ''}"
                             f"{settings.measure}", path=out,
                             fix="bake --measure thickness without --invert for --write-gltf")
    if transmission is not None and not (0.0 <= transmission <= 1.0):
        raise ThickbakeError(f"transmission factor {transmission!r} is outside 0-1", fix="give a number from 0 to 1")
    return plan_volume(source, uv_set=uv_set)


def volume_map(result, uv_set: int = 0, materials=None, name: str = "thickness") -> VolumeMap:
    """The :class:`VolumeMap` of a thickness bake: its grey PNG codes (untagged: glTF decides the colour
    space by the texture's role), the world reach of the top code, and the medium's attenuation."""
    s = result.settings
    assert s.measure == "thickness" and not s.invert
    medium = result.info.get("medium")
    attenuation = medium["gltf_attenuation"] if medium else {}
    return VolumeMap(png=encode_png(result.codes(), linear=False), reach=float(s.reach), uv_set=int(uv_set),
                     materials=None if materials is None else tuple(int(m) for m in materials), name=name,
                     attenuation_color=tuple(attenuation["attenuationColor"]) if medium else None,
                     attenuation_distance=attenuation.get("attenuationDistance") if medium else None)


def write_gltf_copy(source: str | os.PathLike, out: str | os.PathLike, plan: VolumePlan, maps,
                    transmission: float | None = None, write: bool = True):
    """Write the glTF copy; ``maps`` is a list of ``(result, materials or None, uv_set)``.

    Returns the report (materials, factors, files) for the sidecar ``gltf`` block, with a warning
    list: KHR_materials_volume only shows when light can pass the surface.  With ``write=False``
    nothing is written and the return value is ``({path: bytes}, report)``.
    """
    vmaps = [volume_map(result, uv_set, materials, name="thickness" if len(maps) == 1 else f"thickness.{i}")
             for i, (result, materials, uv_set) in enumerate(maps)]
    if write:
        files, report = None, write_volume_copy(source, out, plan, vmaps, transmission)
    else:
        files, report = volume_copy_files(source, out, plan, vmaps, transmission)
    report["warnings"] = []
    opaque = [str(m["name"] or m["material"]) for m in report["materials"] if not m["transmits"]]
    if opaque:
        report["warnings"].append(f"material {', '.join(opaque)} has no extension that lets light through its "
                                  "surface, and KHR_materials_volume takes effect only with one "
                                  "(KHR_materials_transmission or diffuse transmission); add it with --gltf-transmission F")
    return report if write else (files, report)


def settings_for_measure(settings: BakeSettings, measure: str) -> BakeSettings:
    """The settings of a second measure baked in the same run (channel packing): the same options,
    without those that only apply to thickness (``reach = "fit"``, a medium)."""
    if measure == settings.measure:
        return settings
    reach = None if settings.reach == "fit" else settings.reach
    return settings.replace(measure=measure, reach=reach, medium=None, scene_unit=None)


def packed_outputs(image: str | os.PathLike, channels, results: dict, bits: int, fresh: bool = False):
    """The packed PNG's bytes, its sidecar, and the map sidecar's record of it.

    Parameters
    ----------
    image : path of the PNG to pack into (read when it exists, unless ``fresh``)
    channels : list of (channel, measure)
    results : {measure: BakeResult}
    bits : bit depth of a new image
    fresh : start from a new image even if ``image`` exists (batch outputs are rebuilt whole)
    """
    from thickbake.maps.packing import pack_channels
    from thickbake.maps.sidecar import channel_entry, packed_record, packed_sidecar
    from thickbake.version import __version__

    data, facts = pack_channels(image, {c: results[m].stored() for c, m in channels}, bits, fresh=fresh)
    entries = {}
    for channel, measure in channels:
        r = results[measure]
        entries[channel] = channel_entry(measure, r.info["units"], r.settings.reach, r.settings.invert,
                                         r.info["input"], r.info["settings_hash"], facts["bits"])
    sidecar = packed_sidecar(image, entries, facts["bits"], __version__, keep_earlier=not fresh)
    record = packed_record(image, channels, facts["bits"], facts["existed"])
    return data, sidecar, record


__all__ = ["check_volume_request", "volume_map", "write_gltf_copy", "packed_outputs", "settings_for_measure"]
