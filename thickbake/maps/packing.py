"""Channel packing: maps into single channels of one RGBA PNG, the other channels left as they were.

Engines save samplers by packing masks (thickness, occlusion, roughness, ...) into the channels of one
texture.  :func:`pack_channels` writes one or more maps into channels of a new or existing PNG:

* an existing RGB or RGBA image keeps its bit depth and every sample of the channels not written
  (an RGB image gains an alpha channel only when ``a`` is written); each map is requantised to
  that bit depth;
* a new image is RGBA at the requested bit depth, unwritten colour channels 0 and alpha at full
  scale (opaque, so no tool discards the colour of "transparent" texels).

The image's sidecar (``IMAGE.json``) gets one entry per channel with the decode information of the
map in it, merged with the entries of an earlier run for the channels not written now
(:func:`thickbake.maps.sidecar.packed_sidecar`).
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from thickbake.errors import ThickbakeError
from thickbake.maps.png import decode_png, encode_png
from thickbake.maps.sidecar import PACKED_CHANNELS as CHANNELS


def parse_channel_spec(spec: str) -> tuple[str, str | None]:
    """``"g"`` → ("g", None); ``"r=thickness"`` → ("r", "thickness")."""
    channel, _, measure = str(spec).partition("=")
    channel = channel.strip().lower()
    if channel not in CHANNELS or len(channel) != 1:
        raise ThickbakeError(f"channel {spec!r} is not one of r, g, b, a",
                             fix="give --channel g, or CHANNEL=MEASURE such as r=thickness")
    return channel, (measure.strip() or None)


def load_target(path: str | os.PathLike, bits: int) -> tuple[np.ndarray, bool]:
    """(h, w, 3|4) samples of the image to pack into, and whether it existed.

    A missing file gives ``None``-sized placeholder: the caller creates it at the map's size.
    """
    path = Path(path)
    if not path.exists():
        return None, False
    if path.suffix.lower() != ".png":
        raise ThickbakeError("channel packing writes PNG images", path=path, fix="name the image .png")
    try:
        samples = decode_png(path.read_bytes())
    except Exception as exc:  # imagecodecs raises its own error types for broken files
        raise ThickbakeError(f"cannot read the image to pack into ({type(exc).__name__})", path=path,
                             fix="give an RGB or RGBA PNG, or a new file name") from None
    if samples.ndim != 3 or samples.shape[2] not in (3, 4):
        raise ThickbakeError("the image to pack into is not RGB or RGBA", path=path,
                             fix="convert it to RGB(A), or give a new file name")
    return samples, True


def pack_channels(path: str | os.PathLike, stored: dict[str, np.ndarray], bits: int,
                  fresh: bool = False) -> tuple[bytes, dict]:
    """The packed PNG's bytes and what it now holds.

    Parameters
    ----------
    path : path of the new or existing PNG
    stored : {channel: (h, w) float in [0, 1]}
        Normalised map values (as :meth:`BakeResult.stored` gives them) for each channel to write.
    bits : {8, 16}
        Bit depth of a new image (an existing image keeps its own).
    fresh : bool
        Start from a new image even when ``path`` exists.

    Returns
    -------
    (png bytes, {"bits", "existed", "size"})
    """
    first = next(iter(stored.values()))
    height, width = first.shape
    samples, existed = (None, False) if fresh else load_target(path, bits)
    if samples is None:
        dtype = np.uint16 if bits == 16 else np.uint8
        samples = np.zeros((height, width, 4), dtype)
        samples[:, :, 3] = np.iinfo(dtype).max
    else:
        if samples.shape[:2] != (height, width):
            raise ThickbakeError(f"the image is {samples.shape[1]}x{samples.shape[0]}, the map {width}x{height}",
                                 path=path, fix=f"bake with --size {samples.shape[1]}x{samples.shape[0]}")
        if samples.shape[2] == 3 and "a" in stored:
            alpha = np.full((height, width, 1), np.iinfo(samples.dtype).max, samples.dtype)
            samples = np.concatenate([samples, alpha], axis=2)
        samples = samples.copy()
    top = np.iinfo(samples.dtype).max
    for channel, values in stored.items():
        assert values.shape == (height, width)
        samples[:, :, CHANNELS.index(channel)] = np.rint(np.clip(values, 0.0, 1.0) * top).astype(samples.dtype)
    depth = 16 if samples.dtype == np.uint16 else 8
    return encode_png(samples, linear=True), {"bits": depth, "existed": existed, "size": [width, height]}


__all__ = ["pack_channels", "parse_channel_spec", "CHANNELS"]
