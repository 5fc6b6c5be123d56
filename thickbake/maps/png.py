"""PNG files of maps: grey, RGB or RGBA at 8 or 16 bits, tagged as linear data.

Which chunks say "linear", and why
----------------------------------
A map holds data, not a picture: a code is proportional to the measure.  An untagged 8-bit PNG is
taken as sRGB-encoded by most importers, which then "linearise" it and decode wrong values.  Every
integer map therefore carries two chunks, placed right after ``IHDR`` (both must precede ``IDAT``):

* ``gAMA`` = 100000, i.e. gamma 1.0 (PNG specification, §11.3.3.2 of the 2nd edition, §11.3.3.4 of
  the 3rd): samples are proportional to intensity.  It is the colour-space chunk that has been in
  the standard since PNG 1.0, so libpng-based readers, Pillow (``info["gamma"] == 1.0``), image
  editors and browsers honour it.
* ``cICP`` = (1, 8, 0, 1) (PNG 3rd edition, W3C Recommendation 2025, "Coding-independent code
  points"; code points from ITU-T H.273): BT.709 primaries, transfer characteristic 8 = linear,
  matrix 0 (RGB, the only value PNG allows), full range.  It names the linear transfer exactly,
  and readers of the 3rd edition give it precedence over ``gAMA``.

No ``sRGB`` or ``iCCP`` chunk is written: either would claim a non-linear encoding.

Images embedded in a glTF file get no tags (``linear=False``): glTF 2.0 (§3.8.4, "Images") tells
clients to ignore colour-space information in PNG files, since the texture's role decides it
(thickness is linear data), and the Khronos validator reports such chunks as unsupported features.

Pillow writes grey 8/16-bit PNGs; 16-bit RGB/RGBA (which Pillow cannot write, and reads only
truncated to 8 bits) go through imagecodecs.
"""

from __future__ import annotations

import io
import struct
import zlib

import numpy as np

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
#: gAMA payload: gamma × 100000 as a big-endian uint32 (1.0 → 100000).
GAMA_LINEAR = struct.pack(">I", 100000)
#: cICP payload: colour primaries 1 (BT.709), transfer 8 (linear), matrix 0 (RGB), full range 1.
CICP_LINEAR = bytes([1, 8, 0, 1])
LINEAR_CHUNKS = ((b"gAMA", GAMA_LINEAR), (b"cICP", CICP_LINEAR))


def chunk(kind: bytes, payload: bytes) -> bytes:
    """One PNG chunk: length, type, payload, CRC-32 over type and payload (PNG §5.3)."""
    return struct.pack(">I", len(payload)) + kind + payload + struct.pack(">I", zlib.crc32(kind + payload) & 0xFFFFFFFF)


def chunks(data: bytes) -> list[tuple[bytes, bytes]]:
    """(type, payload) of every chunk of a PNG file, in order."""
    if not data.startswith(PNG_SIGNATURE):
        raise ValueError("not a PNG file")
    out = []
    pos = len(PNG_SIGNATURE)
    while pos + 8 <= len(data):
        length, kind = struct.unpack(">I4s", data[pos:pos + 8])
        out.append((kind, data[pos + 8:pos + 8 + length]))
        pos += 12 + length
    return out


def tag_linear(data: bytes) -> bytes:
    """Insert the linear ``gAMA`` and ``cICP`` chunks after ``IHDR``, dropping colour chunks already there."""
    parts = chunks(data)
    assert parts and parts[0][0] == b"IHDR"
    drop = {b"gAMA", b"cICP", b"sRGB", b"iCCP", b"cHRM"}
    body = [chunk(k, p) for k, p in parts[1:] if k not in drop]
    return PNG_SIGNATURE + chunk(*parts[0]) + b"".join(chunk(k, p) for k, p in LINEAR_CHUNKS) + b"".join(body)


def encode_png(array: np.ndarray, linear: bool = True) -> bytes:
    """Encode an image array as PNG bytes.

    Parameters
    ----------
    array : (h, w) or (h, w, c) uint8 or uint16, c in {3, 4}
        Grey, RGB or RGBA samples; the dtype sets the bit depth.
    linear : bool
        Add the ``gAMA`` 1.0 and ``cICP`` linear chunks (see the module docstring).

    Returns
    -------
    bytes
    """
    array = np.ascontiguousarray(array)
    assert array.dtype in (np.uint8, np.uint16), array.dtype
    if array.ndim == 2:
        from PIL import Image

        buffer = io.BytesIO()
        Image.fromarray(array).save(buffer, format="PNG")
        data = buffer.getvalue()
    else:
        assert array.ndim == 3 and array.shape[2] in (3, 4), array.shape
        import imagecodecs

        data = bytes(imagecodecs.png_encode(array))
    return tag_linear(data) if linear else data


def decode_png(data: bytes) -> np.ndarray:
    """PNG bytes → (h, w) or (h, w, c) uint8/uint16 samples, at the file's own bit depth (no rescaling).

    Palette images are expanded to RGB(A) at 8 bits; grey + alpha becomes (h, w, 2).
    """
    import imagecodecs

    return np.asarray(imagecodecs.png_decode(data))


def is_linear_tagged(data: bytes) -> bool:
    """True when the PNG carries gamma 1.0 (``gAMA`` = 100000) or a ``cICP`` with linear transfer."""
    for kind, payload in chunks(data):
        if kind == b"gAMA" and payload == GAMA_LINEAR:
            return True
        if kind == b"cICP" and len(payload) == 4 and payload[1] == 8:
            return True
    return False


__all__ = ["encode_png", "decode_png", "tag_linear", "is_linear_tagged", "chunks", "chunk", "LINEAR_CHUNKS"]
