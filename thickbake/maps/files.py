"""Write stage: images and sidecars, always through a temporary file and an atomic rename.

(What a sidecar holds is :mod:`thickbake.maps.sidecar`'s business; this module only writes the bytes.)

A crash, a kill or a full disk therefore never leaves a half-written map: the destination either
keeps its old content or gets the complete new one.  The sidecar is renamed last, so a map whose
sidecar matches it is known to be complete.
"""

from __future__ import annotations

import io
import json
import os
import secrets
from pathlib import Path

import numpy as np

from thickbake.errors import ThickbakeError
from thickbake.maps.sidecar import described_map, sidecar_path, with_map_checksum

IMAGE_SUFFIXES = (".png", ".tif", ".tiff", ".exr")
#: Permissions asked for when creating a file; the kernel takes the process umask off them (0644 under
#: the usual umask 022), so outputs get the permissions of any file the user creates.  Creating the
#: temporary file with ``os.open(..., 0o666)`` lets the kernel apply the umask, so the umask is never
#: read or changed here (``os.umask`` can only be read by setting it, which races with other threads).
FILE_MODE = 0o666
#: Attempts at finding an unused temporary name (64 random bits each; a clash is astronomically rare).
_TEMP_NAME_TRIES = 16


def _create_temp(folder: Path, name: str) -> tuple[int, Path]:
    """Create ``folder/.NAME.RANDOM.tmp`` exclusively; return its descriptor and path."""
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0) | getattr(os, "O_CLOEXEC", 0)
    for _ in range(_TEMP_NAME_TRIES):
        tmp = folder / f".{name}.{secrets.token_hex(8)}.tmp"
        try:
            return os.open(tmp, flags, FILE_MODE), tmp
        except FileExistsError:
            continue
    raise FileExistsError(f"no free temporary name for {name} in {folder}")


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` via a temporary file in the same folder and ``os.replace``."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = _create_temp(path.parent, path.name)
    try:
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
    """Encode (h, w) or (h, w, 3|4) uint8/uint16 (PNG, tagged linear: see maps.png), (h, w) float32
    (TIFF) or (h, w[, 3]) float (EXR, float samples) to file bytes."""
    from PIL import Image

    buffer = io.BytesIO()
    if suffix == ".png":
        from thickbake.maps.png import encode_png

        assert array.dtype in (np.uint8, np.uint16)
        return encode_png(array, linear=True)
    if suffix == ".exr":
        from thickbake.maps.exr import exr_bytes

        return exr_bytes(array)
    else:
        Image.fromarray(np.ascontiguousarray(array, dtype=np.float32)).save(buffer, format="TIFF")
    return buffer.getvalue()


def read_image(path: str | os.PathLike) -> np.ndarray:
    """Read a grayscale PNG (uint8/uint16), float TIFF or EXR into an (h, w) array (RGB maps: (h, w, 3))."""
    from PIL import Image

    if str(path).lower().endswith(".exr"):
        from thickbake.maps.exr import read_exr

        if not os.path.exists(path):
            raise ThickbakeError("no such file", path=path, fix="check the path")
        try:
            return read_exr(path)[0]
        except Exception as exc:
            raise ThickbakeError(f"cannot read the image ({type(exc).__name__})", path=path,
                                 fix="give a map written by thickbake") from None

    try:
        with Image.open(path) as image:
            return np.array(image)
    except FileNotFoundError:
        raise ThickbakeError("no such file", path=path, fix="check the path") from None
    except Exception as exc:
        raise ThickbakeError(f"cannot read the image ({type(exc).__name__})", path=path,
                             fix="give a PNG or TIFF written by thickbake") from None


def _check_target(path: Path, what: str) -> None:
    """A file we are about to write must not be a folder, and its folder must be creatable."""
    if path.is_dir():
        raise ThickbakeError(f"the {what} would overwrite a folder", path=path, fix="choose another output name")
    for parent in path.parents:
        if parent.exists():
            if not parent.is_dir():
                raise ThickbakeError(f"cannot create the {what}: {parent} is a file, not a folder", path=path,
                                     fix="choose an output path inside a folder")
            if not os.access(parent, os.W_OK):
                raise ThickbakeError(f"no permission to write into {parent}", path=path,
                                     fix="choose a folder you can write to")
            break


def check_output_path(path: str | os.PathLike, error_out: str | os.PathLike | None = None) -> Path:
    """Validate an output map path (and its sidecar and optional error map) before any work is done.

    Refuses a suffix other than PNG/TIFF, targets that are folders or lie under a file, and a sidecar
    that already describes a *different* existing map (``OUT.png`` and ``OUT.tif`` share ``OUT.json``).
    """
    path = Path(path)
    if path.suffix.lower() not in IMAGE_SUFFIXES:
        raise ThickbakeError(f"cannot write a map with suffix {path.suffix or '(none)'!r}", path=path,
                             fix="name the output .png (16/8-bit), .tif (float32) or .exr (half/float)")
    _check_target(path, "map")
    side = sidecar_path(path)
    _check_target(side, "sidecar")
    if side.is_file():
        other = described_map(side)
        if other is not None and other != path.name and (path.parent / other).exists():
            raise ThickbakeError(f"its sidecar {side.name} already describes {other}", path=path,
                                 fix=f"give this map another name than {other} (maps sharing a stem share a sidecar)")
    if error_out is not None:
        err = Path(error_out)
        if err.suffix.lower() not in (".tif", ".tiff"):
            raise ThickbakeError("the error map must be a float TIFF", path=err, fix="name it .tif")
        if err.resolve() == path.resolve():
            raise ThickbakeError("the error map and the map are the same file", path=err, fix="give it its own name")
        _check_target(err, "error map")
    return path


def json_bytes(data: dict) -> bytes:
    return (json.dumps(data, indent=2, sort_keys=False, allow_nan=False) + "\n").encode()


def write_map(path: str | os.PathLike, data: bytes, sidecar: dict,
              extra: dict[str, np.ndarray] | None = None) -> None:
    """Write encoded map bytes, optional extra maps (path → (h, w) array: float32 TIFF, or a uint8 PNG
    mask for a ``.png`` path) and the sidecar.

    Every file is encoded in memory first, then each is written atomically, the sidecar last.  The
    sidecar records the map file's sha256 (``map_sha256``): a run killed between the two renames
    leaves a new map beside the old sidecar, and :meth:`Sidecar.check_map` then refuses the pair
    instead of decoding the new map with the old numbers.
    """
    path = Path(path)
    sidecar = with_map_checksum(sidecar, data)  # ties the pair together
    blobs = [(path, data)]
    for extra_path, array in (extra or {}).items():
        extra_path = Path(extra_path)
        if extra_path.suffix.lower() == ".png":  # a mask: uint8 as given
            blobs.append((extra_path, image_bytes(array, ".png")))
        else:
            blobs.append((extra_path, image_bytes(array.astype(np.float32), ".tif")))
    blobs.append((sidecar_path(path), json_bytes(sidecar)))
    written = []
    try:
        for target, blob in blobs:
            existed = target.exists()
            atomic_write_bytes(target, blob)
            if not existed:
                written.append(target)
    except OSError as exc:
        for target in written:  # no half set of outputs: remove what this call created
            try:
                target.unlink()
            except OSError:
                pass
        raise ThickbakeError(f"cannot write the output ({exc.strerror or exc})", path=exc.filename or target,
                             fix="check the folder exists, is writable and has free space") from None
