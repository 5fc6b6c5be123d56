"""What thickbake may open, and how much it reads: regular files only, size caps, confinement.

Every file the package reads from a user's folders (meshes, glTF buffers, rules files, maps and
sidecars) goes through here, so that nothing hangs and nothing outside the intended folder is read.

* Only regular files are opened: a folder, FIFO (named pipe), device or socket is refused from
  ``os.stat`` alone, so nothing blocks waiting for a writer.  The file is then opened with
  ``O_NONBLOCK`` and checked again through its descriptor, so a file swapped for a FIFO between the
  two checks cannot hang the read either.
* A size cap per file (:data:`MAX_FILE_BYTES` by default) is checked before a byte is read.
* :func:`confined_path` turns a relative URI into a path inside one folder, refusing ``..``,
  absolute paths, URI schemes and links that lead out.
"""

from __future__ import annotations

import os
import re
import stat
from pathlib import Path
from urllib.parse import unquote, urlsplit

from thickbake.errors import ThickbakeError

#: Largest mesh file (and external glTF buffer) accepted, bytes.  A 10-million-triangle OBJ with
#: UVs and normals is about 500 MB of text; loading it needs several GB, so larger files are far
#: outside what a CPU bake handles and most likely not meshes at all.
MAX_FILE_BYTES = 512 * 1024**2

_KINDS = ((stat.S_ISFIFO, "a FIFO (named pipe)"), (stat.S_ISCHR, "a character device"),
          (stat.S_ISBLK, "a block device"), (stat.S_ISSOCK, "a socket"))


def _mb(n: int) -> str:
    return f"{n / 1024**2:.0f} MB"


def check_regular_file(path: str | os.PathLike, what: str = "mesh file", max_bytes: int = MAX_FILE_BYTES) -> os.stat_result:
    """Refuse anything but an existing regular file of at most ``max_bytes`` — without opening it.

    Raises
    ------
    ThickbakeError
        Missing file, dangling link, folder, FIFO, device, socket or a file over the cap.
    """
    try:
        info = os.stat(path)  # follows links; never opens, so a FIFO cannot block here
    except FileNotFoundError:
        if os.path.islink(path):
            raise ThickbakeError(f"the {what} is a link to a missing file", path=path,
                                 fix="point the link at an existing file or delete it") from None
        raise ThickbakeError("no such file", path=path, fix="check the path") from None
    except OSError as exc:
        raise ThickbakeError(f"cannot read the {what} ({exc.strerror or type(exc).__name__})", path=path,
                             fix="check the path and its permissions") from None
    except ValueError:  # a NUL character in the name
        raise ThickbakeError("the file name contains a NUL character", path=repr(os.fspath(path)),
                             fix="check the path") from None
    if stat.S_ISDIR(info.st_mode):
        raise ThickbakeError(f"is a folder, not a {what}", path=path,
                             fix="give a mesh file, or use 'thickbake batch' for folders" if what == "mesh file"
                             else f"give the {what} itself")
    if not stat.S_ISREG(info.st_mode):
        kind = next((name for test, name in _KINDS if test(info.st_mode)), "not a regular file")
        raise ThickbakeError(f"is {kind}, not a regular file", path=path,
                             fix=f"give the {what} itself (a regular file on disk)")
    if info.st_size > max_bytes:
        raise ThickbakeError(f"the {what} is {_mb(info.st_size)}, over the {_mb(max_bytes)} limit", path=path,
                             fix="decimate the mesh or split it into several assets")
    return info


def iter_regular_file(path: str | os.PathLike, what: str = "mesh file", max_bytes: int = MAX_FILE_BYTES,
                      block_bytes: int = 1 << 20):
    """Yield the bytes of a regular file of at most ``max_bytes`` in blocks; never blocks on a FIFO or device.

    The file is judged by ``os.stat`` before it is opened, opened non-blocking, and judged again on the
    open descriptor (it may have been replaced in between).  Every failure is a :class:`ThickbakeError`.
    """
    check_regular_file(path, what, max_bytes)
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_BINARY", 0))
    except OSError as exc:
        raise ThickbakeError(f"cannot open the {what} ({exc.strerror or type(exc).__name__})", path=path,
                             fix="check its permissions") from None
    try:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):  # replaced between the stat and the open
            raise ThickbakeError("is not a regular file", path=path, fix=f"give the {what} itself")
        total = 0
        while True:
            try:
                block = os.read(fd, block_bytes)
            except OSError as exc:
                raise ThickbakeError(f"cannot read the {what} ({exc.strerror or type(exc).__name__})", path=path,
                                     fix="check the disk and the file's permissions") from None
            if not block:
                return
            total += len(block)
            if total > max_bytes:
                raise ThickbakeError(f"the {what} grew over the {_mb(max_bytes)} limit while it was read", path=path,
                                     fix="bake it once it is completely written")
            yield block
    finally:
        os.close(fd)


def read_regular_file(path: str | os.PathLike, what: str = "mesh file", max_bytes: int = MAX_FILE_BYTES) -> bytes:
    """All bytes of a regular file of at most ``max_bytes``; never blocks on a FIFO or device."""
    return b"".join(iter_regular_file(path, what, max_bytes))


def confined_path(folder: str | os.PathLike, uri: str, where: str | os.PathLike) -> Path:
    """The file a relative glTF URI names inside ``folder``, or a ThickbakeError if it escapes.

    ``..`` components, absolute paths, drive letters and URI schemes (``file:``, ``http:``) are
    refused; so is a link that leads outside the folder.
    """
    fix = "keep buffers and textures in the asset's folder (or a folder below it), referenced by relative paths"
    if not isinstance(uri, str) or not uri:
        raise ThickbakeError(f"a URI {uri!r} is not a file name", path=where, fix=fix)
    parts = urlsplit(uri)
    if parts.scheme or parts.netloc:
        raise ThickbakeError(f"the URI {uri!r} is not a relative file name", path=where, fix=fix)
    name = unquote(parts.path)
    pure = Path(name)
    if not name or pure.is_absolute() or name.startswith(("/", "\\")) or ".." in re.split(r"[/\\]", name) or "\x00" in name:
        raise ThickbakeError(f"the URI {uri!r} points outside the asset's folder", path=where, fix=fix)
    root = Path(os.path.realpath(folder))
    target = Path(os.path.realpath(root / name))
    if target != root and root not in target.parents:
        raise ThickbakeError(f"the URI {uri!r} leads outside the asset's folder (through a link)", path=where, fix=fix)
    return root / name
