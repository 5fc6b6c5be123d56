"""Write stage: images and sidecars, always through a temporary file and an atomic rename.

A crash, a kill or a full disk therefore never leaves a half-written map: the destination either
keeps its old content or gets the complete new one.  The sidecar is renamed last, so a map whose
sidecar matches it is known to be complete.
"""

from __future__ import annotations

import io
import json
import os
import tempfile
from pathlib import Path

import numpy as np

from .errors import ThickbakeError

IMAGE_SUFFIXES = (".png", ".tif", ".tiff")
#: The process umask, read once: ``tempfile.mkstemp`` creates 0600 files, and outputs should get the
#: same permissions as any file the user creates (0644 under the usual umask 022).
_UMASK = os.umask(0)
os.umask(_UMASK)


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` via a temporary file in the same folder and ``os.replace``."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        os.fchmod(fd, 0o666 & ~_UMASK)
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    return path


def image_bytes(array: np.ndarray, suffix: str) -> bytes:
    """Encode (h, w) uint8/uint16 (PNG) or float32 (TIFF) grayscale to file bytes."""
    from PIL import Image

    buffer = io.BytesIO()
    if suffix == ".png":
        assert array.dtype in (np.uint8, np.uint16)
        Image.fromarray(np.ascontiguousarray(array)).save(buffer, format="PNG")
    else:
        Image.fromarray(np.ascontiguousarray(array, dtype=np.float32)).save(buffer, format="TIFF")
    return buffer.getvalue()


def read_image(path: str | os.PathLike) -> np.ndarray:
    """Read a grayscale PNG (uint8/uint16) or float TIFF into an (h, w) array."""
    from PIL import Image

    try:
        with Image.open(path) as image:
            return np.array(image)
    except FileNotFoundError:
        raise ThickbakeError("no such file", path=path, fix="check the path") from None
    except Exception as exc:
        raise ThickbakeError(f"cannot read the image ({type(exc).__name__})", path=path,
                             fix="give a PNG or TIFF written by thickbake") from None


def sidecar_path(map_path: str | os.PathLike) -> Path:
    """The sidecar of ``OUT.png`` is ``OUT.json``."""
    return Path(map_path).with_suffix(".json")


def check_output_path(path: str | os.PathLike) -> Path:
    """Validate an output map path before any work is done."""
    path = Path(path)
    if path.suffix.lower() not in IMAGE_SUFFIXES:
        raise ThickbakeError(f"cannot write a map with suffix {path.suffix or '(none)'!r}", path=path,
                             fix="name the output .png (16/8-bit) or .tif (float32)")
    if path.exists() and path.is_dir():
        raise ThickbakeError("the output is a folder", path=path, fix="give a file name such as out.png")
    return path


def json_bytes(data: dict) -> bytes:
    return (json.dumps(data, indent=2, sort_keys=False, allow_nan=False) + "\n").encode()


def write_map(path: str | os.PathLike, data: bytes, sidecar: dict,
              extra: dict[str, np.ndarray] | None = None) -> None:
    """Write encoded map bytes, optional extra float maps (path → (h, w) float32 TIFF) and the sidecar.

    Every file is encoded in memory first, then each is written atomically, the sidecar last.
    """
    path = Path(path)
    blobs = [(path, data)]
    for extra_path, array in (extra or {}).items():
        blobs.append((Path(extra_path), image_bytes(array.astype(np.float32), ".tif")))
    blobs.append((sidecar_path(path), json_bytes(sidecar)))
    for target, blob in blobs:
        atomic_write_bytes(target, blob)


def read_sidecar(map_path: str | os.PathLike) -> dict:
    """Load the sidecar of a map, with a user error if it is missing or broken."""
    side = sidecar_path(map_path)
    try:
        return json.loads(side.read_text())
    except FileNotFoundError:
        raise ThickbakeError("the map has no sidecar", path=side,
                             fix="keep the .json written next to each map by 'thickbake bake'") from None
    except (OSError, ValueError) as exc:
        raise ThickbakeError(f"the sidecar is not valid JSON ({exc})", path=side, fix="bake the map again") from None
