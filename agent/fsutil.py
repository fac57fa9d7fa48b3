"""Durable file writes: a directory replaced whole by temp-and-rename, fsynced."""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import BinaryIO

FileContent = bytes | Callable[[BinaryIO], None]


# Modes of what the daemon keeps private (issue 20): the state directory, and the files
# and sockets in it, whatever the umask it was started with (systemd's unit sets
# StateDirectoryMode=0700 and UMask=0077; a shell's umask is often 022).
PRIVATE_DIR_MODE = 0o700
PRIVATE_FILE_MODE = 0o600


def private_dir(path: Path) -> None:
    """Create `path` (and parents) when missing; a directory made here is 0700. An
    existing directory keeps its mode: the operator chose it."""
    if path.is_dir():
        return
    path.mkdir(parents=True, exist_ok=True)
    os.chmod(path, PRIVATE_DIR_MODE)


def private_file(path: Path) -> None:
    """Make sure `path` exists as a regular file readable by the owner alone (0600),
    created so and never briefly wider; an existing file is narrowed to 0600."""
    fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC | getattr(os, "O_NOFOLLOW", 0),
                 PRIVATE_FILE_MODE)
    try:
        if os.fstat(fd).st_mode & 0o777 != PRIVATE_FILE_MODE:
            os.fchmod(fd, PRIVATE_FILE_MODE)
    finally:
        os.close(fd)


def fsync_dir(path: Path) -> None:
    """Make a rename inside `path` durable (best effort where directories cannot be opened)."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def replace_dir(dest: str | os.PathLike[str], files: Mapping[str, FileContent]) -> Path:
    """Write `files` (name -> bytes, or a function writing to the open file) into a new
    directory and move it to `dest` by rename, so a reader sees the old or the new
    directory whole, never half of one.

    An existing `dest` is replaced in two renames (old aside, new in, old removed); a
    crash in between leaves one of them whole plus a `.old-*` directory beside it.
    """
    dest = Path(dest)
    dest.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{dest.name}.tmp-", dir=dest.parent))
    try:
        for name, content in files.items():
            with open(tmp / name, "wb") as fh:
                if isinstance(content, bytes):
                    fh.write(content)
                else:
                    content(fh)
                fh.flush()
                os.fsync(fh.fileno())
        old = None
        if dest.exists():
            old = dest.parent / f".{dest.name}.old-{os.getpid()}"
            os.rename(dest, old)
        os.rename(tmp, dest)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
        fsync_dir(dest.parent)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return dest


def write_file_atomic(path: str | os.PathLike[str], content: FileContent,
                      mode: int = 0o644) -> Path:
    """Write one file by temp-and-rename (fsynced), readable as `mode` (not mkstemp's 0600).

    `content` is the bytes, or a function that writes them to the open binary file.
    """
    p = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{p.name}.tmp-", dir=p.parent)
    try:
        os.fchmod(fd, mode)
        with os.fdopen(fd, "wb") as fh:
            if isinstance(content, bytes):
                fh.write(content)
            else:
                content(fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, p)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return p
