"""Atomic file writes that never silently overwrite.

Every report, photo copy and summary the tool writes goes through
:func:`write_bytes_atomic`: the data is written to a temporary file in the
same folder, flushed to disk, then moved into place in one step.  A reader
(or a crash) sees either the old state or the complete new file, never a
half-written one.

Without ``force`` an existing file is left untouched and
:class:`OutputExistsError` is raised; the check and the move are one
operation (a hard link, which fails if the name exists), so two writers
racing for the same name cannot both win.
"""

from __future__ import annotations

import errno
import os
import tempfile
from pathlib import Path

from .model import SurfacesError

__all__ = ["OutputExistsError", "write_bytes_atomic", "write_text_atomic"]


class OutputExistsError(SurfacesError):
    """The output file exists and ``force`` was not given."""


def _exists_error(path: Path) -> OutputExistsError:
    return OutputExistsError(
        f"{path} already exists; pass --force to replace it or choose another name"
    )


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:  # pragma: no cover - platforms without directory fds
        return
    try:
        os.fsync(fd)
    except OSError:  # pragma: no cover
        pass
    finally:
        os.close(fd)


def write_bytes_atomic(path: str | os.PathLike, data: bytes, *, force: bool = False) -> Path:
    """Write ``data`` to ``path`` atomically.

    Parameters
    ----------
    path : path-like
        Destination file.  Its folder must exist.
    data : bytes
        The complete file content.
    force : bool, keyword-only
        Replace an existing file.  Without it an existing ``path`` raises
        :class:`OutputExistsError` and is left as it was.

    Returns
    -------
    Path
        The destination path.

    Raises
    ------
    OutputExistsError
        ``path`` exists and ``force`` is false.
    SurfacesError
        The folder does not exist or cannot be written.
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise SurfacesError(f"folder {folder} does not exist; create it or choose another output path")
    if path.is_dir():
        raise SurfacesError(f"{path} is a folder; give a file name for the output")
    if not force and os.path.lexists(path):
        raise _exists_error(path)
    try:
        fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=folder)
    except OSError as err:
        raise SurfacesError(f"cannot write in {folder} ({err.strerror}); choose another output folder") from err
    tmp = Path(tmp_name)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(bytes(data))
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o644)
        if force:
            os.replace(tmp, path)
        else:
            try:
                # link() refuses an existing name: check and move in one step.
                os.link(tmp, path)
            except FileExistsError:
                raise _exists_error(path) from None
            except OSError as err:
                if err.errno not in (errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.EXDEV):
                    raise
                # File systems without hard links: best effort check then replace.
                if os.path.lexists(path):
                    raise _exists_error(path) from None
                os.replace(tmp, path)
        _fsync_dir(folder)
    except OSError as err:
        raise SurfacesError(f"cannot write {path} ({err.strerror}); check the folder and free space") from err
    finally:
        if tmp.exists():
            tmp.unlink()
    return path


def write_text_atomic(
    path: str | os.PathLike, text: str, *, force: bool = False, encoding: str = "utf-8"
) -> Path:
    """Write ``text`` to ``path`` atomically (see :func:`write_bytes_atomic`).

    Newlines are written as given (no platform translation).
    """
    return write_bytes_atomic(path, text.encode(encoding), force=force)
