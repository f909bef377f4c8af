"""The atomic-write helper (gcmc.files): complete or untouched, never half-written."""

from __future__ import annotations

import errno
import os
import stat
from pathlib import Path

import pytest

from gcmc import files


class Boom(RuntimeError):
    pass


def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


def test_writes_the_content_and_leaves_no_temporary(tmp_path: Path) -> None:
    target = tmp_path / "out.json"
    files.atomic_write_text(target, '{"a": 1}\n')
    assert target.read_text() == '{"a": 1}\n'
    files.atomic_write_bytes(target, b"\x00\x01")
    assert target.read_bytes() == b"\x00\x01"
    assert _leftovers(tmp_path) == []


def test_raise_mid_way_keeps_the_old_file_and_removes_the_temporary(tmp_path: Path) -> None:
    """A writer that fails after writing half its content: the old file is untouched and no
    temporary file is left."""
    target = tmp_path / "table.csv"
    target.write_text("old complete content\n")
    with pytest.raises(Boom), files.atomic_write(target, "w") as fh:
        fh.write("new, half")
        fh.flush()
        raise Boom("the writer failed mid-way")
    assert target.read_text() == "old complete content\n"
    assert _leftovers(tmp_path) == []


def test_raise_mid_way_creates_nothing_when_there_was_no_file(tmp_path: Path) -> None:
    target = tmp_path / "new.bin"
    with pytest.raises(Boom), files.atomic_path(target) as tmp:
        tmp.write_bytes(b"partial")
        raise Boom("fail")
    assert not target.exists()
    assert list(tmp_path.iterdir()) == []


def test_the_temporary_is_in_the_target_folder_and_hidden(tmp_path: Path) -> None:
    """Same folder (the rename stays on one file system), hidden name, target absent until
    the block completes."""
    target = tmp_path / "k.h5"
    with files.atomic_path(target) as tmp:
        assert tmp.parent == tmp_path and tmp.name.startswith(".k.h5.")
        assert not target.exists()
        tmp.write_bytes(b"done")
    assert target.read_bytes() == b"done"


def test_no_overwrite_refuses_an_existing_name(tmp_path: Path) -> None:
    target = tmp_path / "k.v1.h5"
    target.write_bytes(b"first")
    with pytest.raises(FileExistsError), files.atomic_path(target, overwrite=False) as tmp:
        tmp.write_bytes(b"second")
    assert target.read_bytes() == b"first"
    assert _leftovers(tmp_path) == []


def test_no_overwrite_without_hard_links_falls_back_to_rename(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A file system without hard links (os.link raises EPERM): published by rename after an
    existence check, still refusing an existing name."""

    def no_link(src: object, dst: object) -> None:
        raise OSError(errno.EPERM, "hard links not supported")

    monkeypatch.setattr(os, "link", no_link)
    target = tmp_path / "a.bin"
    with files.atomic_path(target, overwrite=False) as tmp:
        tmp.write_bytes(b"one")
    assert target.read_bytes() == b"one"
    with pytest.raises(FileExistsError), files.atomic_path(target, overwrite=False) as tmp:
        tmp.write_bytes(b"two")
    assert target.read_bytes() == b"one"
    assert _leftovers(tmp_path) == []


def test_file_and_folder_are_fsynced_before_and_after_the_rename(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The order that makes the write durable: fsync of the complete file, rename, fsync of
    the folder."""
    events: list[str] = []
    real_fsync, real_replace = os.fsync, os.replace

    def fsync(fd: int) -> None:
        events.append("fsync-dir" if stat.S_ISDIR(os.fstat(fd).st_mode) else "fsync-file")
        real_fsync(fd)

    def replace(a: object, b: object) -> None:
        events.append("rename")
        real_replace(a, b)  # type: ignore[arg-type]

    monkeypatch.setattr(os, "fsync", fsync)
    monkeypatch.setattr(os, "replace", replace)
    files.atomic_write_text(tmp_path / "x.txt", "x")
    assert events == ["fsync-file", "rename", "fsync-dir"]


def test_permissions_are_those_of_an_ordinary_open(tmp_path: Path) -> None:
    """mkstemp makes private files; the published file gets 0o666 less the umask."""
    target = tmp_path / "shared.txt"
    files.atomic_write_text(target, "x")
    plain = tmp_path / "plain.txt"
    plain.write_text("x")
    assert stat.S_IMODE(target.stat().st_mode) == stat.S_IMODE(plain.stat().st_mode)


def test_kernel_writer_leaves_nothing_when_it_fails_mid_way(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The kernel writer goes through the helper: a failure inside the HDF5 writing leaves
    neither a kernel nor a temporary file."""
    import sys

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from test_library import make_kernel

    from gcmc.kernel import writer

    def broken(f: object, data: object, *a: object) -> None:
        raise Boom("disk full, say")

    monkeypatch.setattr(writer, "_write_branch", broken)
    with pytest.raises(Boom):
        writer.write_kernel(make_kernel(n_w=3, n_p=5), tmp_path)
    assert list(tmp_path.iterdir()) == []
