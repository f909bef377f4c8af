"""Atomic file writes, shared by every layer (the standard library only).

A file is written to a hidden temporary file in the target's folder, flushed and fsynced,
given the permissions an ordinary ``open()`` would give it, then renamed to its final name
(``os.replace``; or a hard link that fails if the name exists, when overwriting is not
allowed), and the folder is fsynced so the rename survives a crash. If anything raises before
the rename, the temporary file is removed and the target is untouched: a reader sees the old
file or the complete new one, never a half-written one.
"""

from __future__ import annotations

import errno
import os
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import IO, Any

#: errno values of a file system without hard links (then publish by rename after a check).
_NO_LINK = frozenset(
    {errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.EXDEV, errno.EMLINK, errno.ENOSYS}
)


def default_mode() -> int:
    """0o666 less the process umask: the mode an ordinary ``open()`` gives a new file."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


def fsync_dir(folder: str | Path) -> None:
    """fsync a folder (its entries: a rename in it becomes durable); a no-op where the
    platform cannot open folders."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _fsync_file(path: Path) -> None:
    with open(path, "rb+") as fh:
        os.fsync(fh.fileno())


def publish(tmp: str | Path, final: str | Path, overwrite: bool = True) -> None:
    """Give a complete, fsynced temporary file its final name in the same folder.

    ``overwrite=False`` refuses an existing name (FileExistsError): a hard link, atomic and
    failing if the name exists, or, on a file system without hard links, an existence check
    then ``os.replace``. The folder is fsynced afterwards.
    """
    tmp, final = Path(tmp), Path(final)
    if overwrite:
        os.replace(tmp, final)
    else:
        try:
            os.link(tmp, final)
        except FileExistsError:
            raise FileExistsError(errno.EEXIST, "file exists", str(final)) from None
        except OSError as exc:
            if exc.errno not in _NO_LINK:
                raise
            if final.exists():
                raise FileExistsError(errno.EEXIST, "file exists", str(final)) from None
            os.replace(tmp, final)
        else:
            tmp.unlink(missing_ok=True)
    fsync_dir(final.parent if str(final.parent) else Path("."))


@contextmanager
def atomic_path(path: str | Path, overwrite: bool = True) -> Iterator[Path]:
    """Context manager: a temporary path to write ``path`` through (for writers that need a
    file name, such as h5py or matplotlib).

    On a normal exit the temporary file is fsynced, given :func:`default_mode` and published
    with :func:`publish`; on an exception (or a failed publish) it is removed and the target
    is left as it was. The folder must exist.

    Examples
    --------
    >>> with atomic_path(folder / "table.h5") as tmp:  # doctest: +SKIP
    ...     write_table(tmp)
    """
    final = Path(path)
    folder = final.parent if str(final.parent) else Path(".")
    fd, name = tempfile.mkstemp(prefix=f".{final.name}.", suffix=".tmp", dir=folder)
    os.close(fd)
    tmp = Path(name)
    try:
        yield tmp
        _fsync_file(tmp)
        os.chmod(tmp, default_mode())
        publish(tmp, final, overwrite=overwrite)
    finally:
        tmp.unlink(missing_ok=True)


@contextmanager
def atomic_write(
    path: str | Path, mode: str = "wb", overwrite: bool = True, **open_kw: Any
) -> Iterator[IO[Any]]:
    """Context manager: an open file (``mode`` "w" or "wb") whose content replaces ``path``
    only when the block completes; see :func:`atomic_path`.

    Examples
    --------
    >>> with atomic_write("out.json", "w") as fh:  # doctest: +SKIP
    ...     json.dump(record, fh)
    """
    if mode not in ("w", "wb"):
        raise ValueError(f"mode: 'w' or 'wb', got {mode!r}")
    with atomic_path(path, overwrite=overwrite) as tmp, open(tmp, mode, **open_kw) as fh:
        yield fh
        fh.flush()


def atomic_write_bytes(path: str | Path, data: bytes, overwrite: bool = True) -> None:
    """Write ``data`` to ``path`` atomically."""
    with atomic_write(path, "wb", overwrite=overwrite) as fh:
        fh.write(data)


def atomic_write_text(
    path: str | Path, text: str, overwrite: bool = True, encoding: str = "utf-8"
) -> None:
    """Write ``text`` to ``path`` atomically (UTF-8 by default)."""
    with atomic_write(path, "w", overwrite=overwrite, encoding=encoding) as fh:
        fh.write(text)


__all__ = [
    "atomic_path",
    "atomic_write",
    "atomic_write_bytes",
    "atomic_write_text",
    "default_mode",
    "fsync_dir",
    "publish",
]
