"""The sidecar schema module: what a bake writes is what a reader gets back, and bad fields are named."""

from __future__ import annotations

import json

import numpy as np
import pytest

import thickbake
from thickbake.checks import shapes
from thickbake.errors import ThickbakeError
from thickbake.maps.files import read_image
from thickbake.maps.sidecar import parse_sidecar, read_sidecar


@pytest.fixture(scope="module")
def box_bake():
    return thickbake.bake(shapes.box().mesh, size=32, rays=4, seed=1, threads=1)


@pytest.mark.parametrize("name, invert, bits", [("m.png", False, 16), ("m.png", True, 8), ("m.tif", False, 16)])
def test_written_sidecar_reads_back_and_decodes_the_written_map(box_bake, tmp_path, name, invert, bits):
    result = thickbake.BakeResult(**{**box_bake.__dict__, "settings": box_bake.settings.replace(invert=invert, bits=bits)})
    path = result.write(tmp_path / name)
    side = read_sidecar(path)
    assert side.measure.name == "thickness" and side.reach == result.settings.reach
    assert side.map_name == name and side.version == thickbake.__version__
    assert side.data["run"]["threads"] == 1 and "threads" not in side.data["settings"]
    values = side.encoding.decode(read_image(path), path)
    # decoding through the sidecar gives back the baked thickness to within half a code step (a TIFF: float32)
    tolerance = 0.5 * side.encoding.step * (1 + 1e-9) if side.encoding.code_max else 1e-6 * result.settings.reach
    assert np.abs(values - result.padded()).max() <= tolerance


@pytest.mark.parametrize("change, field", [
    (lambda d: d["encoding"].update(code_max="abc"), "encoding.code_max"),
    (lambda d: d["encoding"].update(code_max=True), "encoding.code_max"),
    (lambda d: d["encoding"].pop("scale"), "encoding.scale"),
    (lambda d: d.update(measure="heat"), "measure"),
    (lambda d: d.update(reach=-1.0), "reach"),
])
def test_bad_fields_are_named(box_bake, change, field):
    data = json.loads(json.dumps(box_bake.sidecar("m.png")))
    change(data)
    with pytest.raises(ThickbakeError, match=f"sidecar's {field} is"):
        parse_sidecar(data, "m.json")


def test_missing_sidecar_is_a_user_error(tmp_path):
    with pytest.raises(ThickbakeError, match="no sidecar"):
        read_sidecar(tmp_path / "nothing.png")


def test_packed_sidecar_keeps_earlier_channels_of_the_same_image_only(box_bake, tmp_path):
    from thickbake.maps.sidecar import Encoding, channel_entry, packed_sidecar, sidecar_path

    s = box_bake.settings
    entry = channel_entry("thickness", "scene units", s.reach, False, {"file": "box.obj"}, "h", 8)
    # a channel decodes like a one-channel PNG of the same settings (the same encoding, without "format")
    enc = entry["encoding"]
    assert Encoding(enc["code_max"], enc["offset"], enc["scale"]) == Encoding.of(".png", "thickness", s.reach, False, 8)
    image = tmp_path / "packed.png"
    first = packed_sidecar(image, {"g": entry}, 8, "v")
    sidecar_path(image).write_text(json.dumps(first))
    second = packed_sidecar(image, {"r": dict(entry, settings_hash="other")}, 8, "v")
    assert list(second["channels"]) == ["r", "g"] and second["channels"]["g"] == entry
    assert list(packed_sidecar(image, {"r": entry}, 8, "v", keep_earlier=False)["channels"]) == ["r"]
    # the sidecar of another image, or one that is not JSON, contributes nothing
    sidecar_path(image).write_text(json.dumps(dict(first, image="other.png")))
    assert list(packed_sidecar(image, {"r": entry}, 8, "v")["channels"]) == ["r"]
    sidecar_path(image).write_text("{not json")
    assert list(packed_sidecar(image, {"r": entry}, 8, "v")["channels"]) == ["r"]
