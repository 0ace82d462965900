"""Writing files so that a failure leaves nothing half-written.

Every file jointfmu writes goes through :func:`atomic_write`: the content goes to a temporary file
in the target folder, which is then given a normal new file's permissions and moved onto the
target in one ``os.replace``; on any error the temporary file is removed and the target is as it
was.
"""
from __future__ import annotations

import os
import shutil
import tempfile
from contextlib import contextmanager
from pathlib import Path

__all__ = ["atomic_write", "publish", "swap_into_place"]


def publish(tmp: str | os.PathLike, dest: str | os.PathLike) -> None:
    """Give a finished temporary file the permissions of a normal new file (``mkstemp`` makes it
    0600) and move it onto ``dest`` in one step."""
    mask = os.umask(0)
    os.umask(mask)
    os.chmod(tmp, 0o666 & ~mask)
    os.replace(tmp, dest)


@contextmanager
def atomic_write(path: str | os.PathLike, mode: str = "w", **open_kwargs):
    """Open a temporary file beside ``path`` for writing; on success it replaces ``path``.

    ``mode`` is ``"w"`` (text, UTF-8 unless ``encoding`` is given) or ``"wb"``; further keyword
    arguments go to :func:`open`.  The parent folder is created if needed.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    if "b" not in mode:
        open_kwargs.setdefault("encoding", "utf-8")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    try:
        with os.fdopen(fd, mode, **open_kwargs) as f:
            yield f
        publish(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def swap_into_place(tmp: Path, target: Path) -> None:
    """Replace folder ``target`` by the complete folder ``tmp`` (same parent).

    The old folder is first renamed aside, then ``tmp`` renamed into place, then the old one
    removed; if the second rename fails the old folder is put back.  A reader sees either the old
    or the new folder, never a half-written one (two renames; POSIX has no atomic folder swap).
    """
    old = None
    if target.exists():
        old = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".old", dir=target.parent))
        old.rmdir()
        os.replace(target, old)
    try:
        os.replace(tmp, target)
    except BaseException:
        if old is not None:
            os.replace(old, target)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
