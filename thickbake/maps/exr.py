"""OpenEXR maps: the measure as half or float samples, with the decode information in the header.

A one-channel map is written as channel ``Y``, an RGB map (a medium's transmittance) as ``R``, ``G``,
``B``; samples are the measure itself (no scaling), so the decode is the identity.  The header carries
string/float attributes ``thickbake_measure``, ``thickbake_units``, ``thickbake_formula``,
``thickbake_reach``, ``thickbake_color_space`` ("linear") and ``thickbake_decode`` (the sidecar's
decode fields as JSON: measure, units, encoding, reach, inversion, medium, settings hash and input
checksum — no timings, so the same bake gives the same bytes), so a pipeline that only has the EXR
file can still decode it.  ZIP compression (lossless).
Uses the OpenEXR package (the Academy Software Foundation's Python binding) through its public API.
"""

from __future__ import annotations

import os
import tempfile

import numpy as np

from thickbake.maps.sidecar import decode_attributes

PIXEL_TYPES = ("float", "half")


def exr_bytes(array: np.ndarray, attributes: dict | None = None, pixel_type: str = "float") -> bytes:
    """Encode an (h, w) or (h, w, 3) float map as EXR bytes.

    Parameters
    ----------
    array : (h, w) or (h, w, 3) float
    attributes : dict of str → str/float, optional
        Extra header attributes (names should not clash with the standard ones).
    pixel_type : {"float", "half"}
        32-bit or 16-bit floating-point samples.
    """
    import OpenEXR

    assert pixel_type in PIXEL_TYPES, pixel_type
    dtype = np.float16 if pixel_type == "half" else np.float32
    array = np.asarray(array)
    if array.ndim == 2:
        channels = {"Y": np.ascontiguousarray(array.astype(dtype))}
    else:
        assert array.ndim == 3 and array.shape[2] == 3, array.shape
        channels = {name: np.ascontiguousarray(array[:, :, i].astype(dtype)) for i, name in enumerate("RGB")}
    header = {"compression": OpenEXR.ZIP_COMPRESSION, "type": OpenEXR.scanlineimage}
    for key, value in (attributes or {}).items():
        header[key] = value if isinstance(value, (str, float)) else (float(value) if isinstance(value, int) else str(value))
    # the binding writes to a path: write into a private temporary file and read the bytes back, so
    # the caller's atomic writer places the final file
    fd, tmp = tempfile.mkstemp(suffix=".exr")
    os.close(fd)
    try:
        with OpenEXR.File(header, channels) as handle:
            handle.write(tmp)
        with open(tmp, "rb") as f:
            return f.read()
    finally:
        os.unlink(tmp)


def read_exr(path: str | os.PathLike) -> tuple[np.ndarray, dict]:
    """(samples as float32 (h, w) or (h, w, 3), header dict) of an EXR map written by :func:`exr_bytes`."""
    import OpenEXR

    with OpenEXR.File(str(path)) as handle:
        header = dict(handle.header())
        channels = handle.channels()
        if "Y" in channels:
            data = np.asarray(channels["Y"].pixels, np.float32)
        else:
            data = np.stack([np.asarray(channels[c].pixels, np.float32) for c in "RGB"], axis=-1)
    return data, header


def sidecar_attributes(sidecar: dict) -> dict:
    """The header attributes that carry a sidecar's decode information
    (:func:`thickbake.maps.sidecar.decode_attributes`)."""
    return decode_attributes(sidecar)


__all__ = ["exr_bytes", "read_exr", "sidecar_attributes", "PIXEL_TYPES"]
