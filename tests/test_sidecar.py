"""The sidecar schema module: what a bake writes is what a reader gets back, and bad fields are named."""

from __future__ import annotations

import json

import numpy as np
import pytest

import thickbake
from thickbake.checks import shapes
from thickbake.errors import ThickbakeError
from thickbake.maps.files import read_image
from thickbake.maps.sidecar import Encoding, parse_sidecar, read_sidecar


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


def test_reader_view_gives_back_what_the_bake_wrote(box_bake, tmp_path):
    # map_of, units and the decode come back typed from the sidecar written beside the map
    path = box_bake.write(tmp_path / "m.png")
    side = read_sidecar(path)
    assert side.map_of is not None and side.map_of.to_dict() == box_bake.info["map_of"]
    assert side.units == box_bake.info["units"] and side.medium is None
    assert side.encoding == Encoding.of(".png", "thickness", box_bake.settings.reach, False, box_bake.settings.bits)


@pytest.mark.parametrize("change, field", [
    (lambda d: d.update(map_of="tile 1001"), "map_of"),
    (lambda d: d.update(map_of={"material": True, "uv_set": 0, "tile": None}), "map_of.material"),
    (lambda d: d.update(map_of={"material": None, "uv_set": -1, "tile": None}), "map_of.uv_set"),
    (lambda d: d.update(map_of={"material": None, "uv_set": 0, "tile": 7}), "map_of.tile"),
    (lambda d: d.update(medium={"sigma_tr_per_mm": [1.0, "x", 2.0], "mm_per_unit": 1.0}), "medium.sigma_tr_per_mm"),
    (lambda d: d.update(medium={"sigma_tr_per_mm": [1.0, 1.0, 2.0], "mm_per_unit": 0}), "medium.mm_per_unit"),
])
def test_bad_reader_fields_are_named_like_the_decode_fields(box_bake, change, field):
    data = json.loads(json.dumps(box_bake.sidecar("m.png")))
    change(data)
    with pytest.raises(ThickbakeError) as err:
        parse_sidecar(data, "m.json")
    message = str(err.value)
    assert message.startswith(f"m.json: the sidecar's {field} is ") and "\n" not in message
    # the same fix as a bad encoding field
    data = json.loads(json.dumps(box_bake.sidecar("m.png")))
    data["encoding"]["scale"] = "abc"
    with pytest.raises(ThickbakeError) as other:
        parse_sidecar(data, "m.json")
    assert message.split("; ", 1)[1] == str(other.value).split("; ", 1)[1]


def test_packed_channel_fields_are_named_like_a_maps(box_bake):
    from thickbake.maps.sidecar import channel_entry, parse_any_sidecar, parse_packed_sidecar

    s = box_bake.settings
    entry = channel_entry("occlusion", "unitless", s.reach, True, {"file": "box.obj"}, "h", 16)
    data = {"image": "p.png", "bits": 16, "channels": {"b": entry, "x": "not a channel"}}
    packed = parse_any_sidecar(data, "p.json")
    assert list(packed.channels) == ["b"] and packed.image == "p.png"
    b = packed.channels["b"]
    assert b.measure.name == "occlusion" and b.inverted
    assert b.encoding == Encoding.of(".png", "occlusion", s.reach, True, 16)
    # a bad channel field reads as the same line as the map's own field, with the channel's path
    single = json.loads(json.dumps(box_bake.sidecar("p.png")))
    single["encoding"]["code_max"] = "abc"
    with pytest.raises(ThickbakeError) as map_error:
        parse_sidecar(single, "p.json")
    bad = json.loads(json.dumps(data))
    bad["channels"]["b"]["encoding"]["code_max"] = "abc"
    with pytest.raises(ThickbakeError) as channel_error:
        parse_packed_sidecar(bad, "p.json")
    assert str(channel_error.value) == str(map_error.value).replace("encoding.code_max", "channels.b.encoding.code_max")
    bad["channels"]["b"] = 3
    with pytest.raises(ThickbakeError, match=r"sidecar's channels\.b is 3"):
        parse_packed_sidecar(bad, "p.json")
