"""Atomic writes: a reader never sees a half-written file or folder."""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

from .exceptions import ArchiveError

__all__ = ["atomic_write_text", "atomic_dir", "write_with"]


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _share(path: Path, mode: int = 0o666) -> None:
    """mkstemp/mkdtemp create private files and folders; results are meant to be shared."""
    os.chmod(path, mode & ~_umask())


def atomic_write_text(path: str | Path, text: str) -> Path:
    """Write ``text`` to ``path`` through a temporary file in the same folder, then rename."""
    return write_with(path, lambda tmp: tmp.write_text(text, encoding="utf-8"))


@contextmanager
def atomic_dir(target: str | Path, *, overwrite: bool = True) -> Iterator[Path]:
    """Yield a temporary folder beside ``target``; on success it replaces ``target``.

    On any error the temporary folder is removed and an existing ``target`` is
    left untouched. The old folder is moved aside and deleted only after the new
    one is in place.
    """
    target = Path(target)
    if target.exists() and not target.is_dir():
        raise ArchiveError(f"{str(target)!r} exists and is not a folder.")
    if target.exists() and not overwrite:
        raise ArchiveError(f"{str(target)!r} already exists; choose another folder or allow overwriting.")
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(dir=target.parent, prefix=f".{target.name}.", suffix=".partial"))
    try:
        yield tmp
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    _share(tmp, 0o777)
    old = None
    if target.exists():
        old = target.with_name(f".{target.name}.old-{os.getpid()}")
        shutil.rmtree(old, ignore_errors=True)
        os.replace(target, old)
    os.replace(tmp, target)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def write_with(path: str | Path, writer: Callable[[Path], None]) -> Path:
    """Call ``writer(tmp_path)`` and rename the temporary file onto ``path``."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=path.suffix)
    os.close(fd)
    try:
        writer(Path(tmp))
        _share(Path(tmp))
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path
