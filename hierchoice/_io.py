"""Atomic writes, and folders that hierchoice may replace.

A reader never sees a half-written file or folder. A folder is replaced only if
hierchoice wrote it: every folder it writes holds a small marker file
(:data:`MARKER`) that names the kind of folder and lists the entries hierchoice
put there. A folder without the marker, of another kind, or holding anything
hierchoice did not write is refused before any work starts, so no command can
delete a file of the user's.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from pathlib import Path

from .exceptions import ArchiveError

__all__ = ["atomic_write_text", "atomic_dir", "write_with", "claim_folder", "make_folder", "MARKER"]

MARKER = ".hierchoice-folder.json"


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _share(path: Path, mode: int = 0o666) -> None:
    """mkstemp/mkdtemp create private files and folders; results are meant to be shared."""
    os.chmod(path, mode & ~_umask())


def _read_marker(folder: Path) -> dict | None:
    try:
        data = json.loads((folder / MARKER).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


def _write_marker(folder: Path, kind: str, entries: Iterable[str]) -> None:
    body = json.dumps({"written_by": "hierchoice", "kind": kind, "entries": sorted(set(entries))}, indent=1)
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=f"{MARKER}.")
    with os.fdopen(fd, "w", encoding="utf-8") as fh:
        fh.write(body + "\n")
    _share(Path(tmp))
    os.replace(tmp, folder / MARKER)


def _register(folder: Path, name: str) -> None:
    """Add ``name`` to the marker of a folder hierchoice wrote (nothing happens in any other folder)."""
    marker = _read_marker(folder)
    if marker is None or name in marker.get("entries", []):
        return
    _write_marker(folder, str(marker.get("kind", "")), [*marker.get("entries", []), name])


def _is_within(path: Path, folder: Path) -> bool:
    try:
        path.relative_to(folder)
        return True
    except ValueError:
        return False


def claim_folder(target: str | Path, kind: str, *, inputs: Iterable[str | Path] = (),
                 overwrite: bool = True) -> Path:
    """Check that ``target`` may be written as a hierchoice folder of ``kind``; return its absolute path.

    Allowed: a folder that does not exist yet, an empty folder, or (with ``overwrite``) a
    folder that hierchoice itself wrote as the same kind and that holds nothing else.
    Refused with :class:`~hierchoice.exceptions.ArchiveError`, before any work is done:
    a file, the current folder or one above it, a folder that holds one of ``inputs``,
    and any folder holding entries hierchoice did not write there.
    """
    target = Path(os.path.abspath(os.fspath(target)))
    shown = str(target)
    cwd = Path.cwd()
    if target.exists() and not target.is_dir():
        raise ArchiveError(f"{shown!r} exists and is not a folder; choose a folder name for the output.")
    if target == Path(target.anchor) or _is_within(cwd, target):
        raise ArchiveError(f"{shown!r} is the current folder or holds it; write the output to a new subfolder, "
                           "e.g. --out results.")
    for item in inputs:
        if _is_within(Path(os.path.abspath(os.fspath(item))), target):
            raise ArchiveError(f"The input {str(item)!r} lies inside the output folder {shown!r}, which would be "
                               "replaced; choose another output folder.")
    if not target.exists():
        return target
    entries = sorted(p.name for p in target.iterdir())
    if not entries:
        return target
    marker = _read_marker(target)
    if marker is None or marker.get("written_by") != "hierchoice":
        raise ArchiveError(
            f"{shown!r} already exists and was not written by hierchoice (it holds {_first(entries)}). "
            "hierchoice replaces only folders it wrote itself; choose a new folder name, or move those files "
            "away yourself.")
    if marker.get("kind") != kind:
        raise ArchiveError(f"{shown!r} is a hierchoice {marker.get('kind')} folder, not a {kind} folder; "
                           "choose another folder name.")
    foreign = [e for e in entries if e != MARKER and e not in set(marker.get("entries", []))]
    if foreign:
        raise ArchiveError(
            f"{shown!r} holds files hierchoice did not write ({_first(foreign)}); they would be lost if the "
            "folder were replaced. Move them elsewhere, or choose a new folder name.")
    if not overwrite:
        raise ArchiveError(f"{shown!r} already exists; choose another folder or allow overwriting.")
    return target


def _first(names: list[str], k: int = 3) -> str:
    shown = ", ".join(repr(n) for n in names[:k])
    return shown + (f" and {len(names) - k} more" if len(names) > k else "")


def atomic_write_text(path: str | Path, text: str) -> Path:
    """Write ``text`` to ``path`` through a temporary file in the same folder, then rename."""
    return write_with(path, lambda tmp: tmp.write_text(text, encoding="utf-8"))


@contextmanager
def atomic_dir(target: str | Path, *, kind: str = "results", overwrite: bool = True,
               inputs: Iterable[str | Path] = ()) -> Iterator[Path]:
    """Yield a temporary folder beside ``target``; on success it replaces ``target``.

    ``target`` is checked with :func:`claim_folder` before the body runs and again
    before the swap. On any error the temporary folder is removed and an existing
    ``target`` is left untouched. The old folder is moved aside and deleted only
    after the new one is in place. The new folder carries the marker of ``kind``.
    """
    inputs = tuple(inputs)
    target = claim_folder(target, kind, inputs=inputs, overwrite=overwrite)
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(dir=target.parent, prefix=f".{target.name}.", suffix=".partial"))
    old = None
    try:
        yield tmp
        claim_folder(target, kind, inputs=inputs, overwrite=overwrite)  # nothing foreign arrived meanwhile
        _write_marker(tmp, kind, (p.name for p in tmp.iterdir()))
        _share(tmp, 0o777)
        if target.exists():
            old = target.with_name(f".{target.name}.old-{os.getpid()}")
            shutil.rmtree(old, ignore_errors=True)
            os.replace(target, old)
        os.replace(tmp, target)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        if old is not None and not target.exists():
            os.replace(old, target)  # put the earlier folder back
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
    _register(target.parent, target.name)


def write_with(path: str | Path, writer: Callable[[Path], None]) -> Path:
    """Call ``writer(tmp_path)`` and rename the temporary file onto ``path``.

    A file written into a hierchoice folder is added to its marker.
    """
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
    _register(path.parent, path.name)
    return path


def make_folder(target: str | Path, kind: str, *, inputs: Iterable[str | Path] = ()) -> Path:
    """Create (or reuse) a hierchoice folder of ``kind`` that files are then written into one by one."""
    target = claim_folder(target, kind, inputs=inputs)
    target.mkdir(parents=True, exist_ok=True)
    if _read_marker(target) is None:
        _write_marker(target, kind, [])
    _register(target.parent, target.name)
    return target
