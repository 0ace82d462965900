"""Writing files so that a failure leaves nothing half-written.

Every file jointfmu writes goes through :func:`atomic_write`: the content goes to a temporary file
in the target folder, which is then given a normal new file's permissions and moved onto the
target in one ``os.replace``; on any error the temporary file is removed and the target is as it
was.

:func:`check_output_path` is the one check, made before a command starts its work, that an output
can be written where it was asked for; it names the path and the reason when it cannot.
"""
from __future__ import annotations

import os
import shutil
import tempfile
from contextlib import contextmanager
from pathlib import Path

from .errors import OutputPathError

__all__ = ["atomic_write", "check_output_path", "nearest_folder", "publish", "swap_into_place"]

#: What :func:`check_output_path` is asked to check: a file written atomically beside itself, a
#: folder replaced as a whole (built beside itself, then renamed), a folder written into.
OUTPUT_KINDS = ("file", "folder", "into")


def check_output_path(path: str | os.PathLike, kind: str = "file", what: str = "output") -> Path:
    """Check, before any work starts, that ``path`` can be written; raise if it cannot.

    What every writer here needs (:func:`atomic_write`, :func:`swap_into_place`): the nearest
    existing folder at or above ``path``'s parent is a folder (not a regular file) in which this
    user may create entries (``os.access`` with ``W_OK | X_OK``: the permission bits, a
    read-only file system, ACLs); for ``kind="into"`` an existing ``path`` must itself be such
    a folder.  An existing ``path`` must be a file for ``"file"`` and a folder otherwise.

    Parameters
    ----------
    path : path-like
    kind : {"file", "folder", "into"}
        A file replaced atomically, a folder replaced as a whole, or a folder files are
        written into (created if missing).
    what : str
        How the path was given, for the message (``"--output"``, ``"report folder"``...).

    Returns
    -------
    Path

    Raises
    ------
    OutputPathError
        One line naming the path and the reason.

    Notes
    -----
    The superuser passes ``os.access`` for any permission bits, and another process may change
    the file system after the check; the writers stay atomic, and the CLI turns a later
    ``OSError`` into a one-line message as well.
    """
    if kind not in OUTPUT_KINDS:
        raise ValueError(f"kind {kind!r}: allowed are {', '.join(OUTPUT_KINDS)}")
    p = Path(path)
    text = str(path)
    try:
        if p.exists():
            if kind == "file" and p.is_dir():
                raise OutputPathError(what, text, "it is a folder; a file path is needed here")
            if kind != "file" and not p.is_dir():
                raise OutputPathError(what, text, "it is a file; a folder path is needed here")
        folder = p if kind == "into" and p.is_dir() else nearest_folder(p)
        if not folder.is_dir():
            raise OutputPathError(what, text, f"{str(folder)!r} is a file, not a folder"
                                  if folder.is_file() else f"{str(folder)!r} is not a folder")
    except OSError as exc:
        if isinstance(exc, OutputPathError):
            raise
        raise OutputPathError(what, text, f"cannot be inspected: {exc.strerror or exc}") from None
    if not os.access(folder, os.W_OK | os.X_OK):
        raise OutputPathError(what, text, f"folder {str(folder)!r} is not writable "
                                          "(permission denied or a read-only file system)")
    return p


def nearest_folder(path: str | os.PathLike) -> Path:
    """The nearest existing entry at or above ``path``'s parent: the folder a writer of
    ``path`` creates its temporary file or new folders in (it may turn out to be a file)."""
    folder = Path(path).parent
    while not os.path.lexists(folder) and folder != folder.parent:
        folder = folder.parent
    return folder


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
