"""Writing files so that a failure leaves nothing half-written.

Every file jointfmu writes goes through :func:`atomic_write`: the content goes to a temporary file
in the target folder, which is then given a normal new file's permissions and moved onto the
target in one ``os.replace``; on any error the temporary file is removed and the target is as it
was.
"""
from __future__ import annotations

import os
import tempfile
from contextlib import contextmanager
from pathlib import Path

__all__ = ["atomic_write", "publish"]


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
