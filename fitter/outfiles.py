"""Files Platebook writes: atomic, collision-free, never through a symbolic link.

Every writer (model cards, fit and stage plots, exports, the matching CSV) goes through
this module, so the rules hold in one place:

* **Atomic.**  :func:`write_atomic` writes a temporary file in the target's own folder
  (``tempfile.mkstemp``), flushes and fsyncs it, then ``os.replace``-s it onto the target.
  A reader sees the old file or the new one, never half a file; a crash or a failed write
  leaves the old file in place and removes the temporary one.
* **No symbolic links followed.**  The temporary file is created afresh (``O_EXCL``) and
  ``os.replace`` replaces a directory entry, so when the target is a symbolic link, the
  link itself is replaced by the new file; nothing is ever written through it.  The folder
  the user names may itself be a link; only its entries never redirect a write.
* **One file per unit.**  :func:`unit_stem` maps a (tube, section) identity to a file
  stem.  A name made only of ``[A-Za-z0-9.-]`` (not starting with ``.`` or ``-``) keeps
  its plain stem ``tube`` or ``tube_section``; any other name (a ``_``, ``:``, ``/``, a
  space, ``?``, anything non-ASCII ...) gets the sanitised stem plus ``~`` and a short
  hash of the exact identity, so ``X:A``, ``X_A``, ``X/A``, ``X A``, ``X?A`` and
  (tube X, section A) give six different files.  :func:`unit_stems` also separates stems
  that differ only by letter case (case-insensitive file systems) within one run.
  Stems are cut to :data:`MAX_STEM` characters, keeping the hash, so no name is too long
  for the file system.
* **Errors name the path.**  Every failure is an :class:`OutputError` whose one-line
  message starts with the path (a folder that cannot be made, a target that is a folder,
  a name the file system refuses).
"""

from __future__ import annotations

import errno
import hashlib
import os
import re
import stat
import tempfile
from pathlib import Path
from typing import Callable, Iterable

from .errors import InputError
from .text import shown

__all__ = ["OutputError", "MAX_STEM", "PLOT_FORMATS", "unit_stem", "unit_stems", "prepare_folder",
           "write_atomic", "plot_path"]

#: Longest file stem written [characters, all ASCII].  Model suffixes (``.dempwolf.json``)
#: and the temporary file's prefix fit well within the usual 255-byte limit of a name.
MAX_STEM = 120

#: Plot formats by file suffix (matplotlib writes all three with the Agg backend).
PLOT_FORMATS = ("png", "pdf", "svg")

_PLAIN = re.compile(r"[A-Za-z0-9][A-Za-z0-9.-]*")
_HASH_CHARS = 8


class OutputError(InputError):
    """A file or folder could not be written; ``file`` is the path, the message says why."""

    def __init__(self, path, message: str):
        super().__init__(message, file=shown(str(path)))


def _hash(identity: str, n: int = _HASH_CHARS) -> str:
    # surrogatepass: a name decoded with surrogateescape still hashes, and stably
    return hashlib.sha256(identity.encode("utf-8", "surrogatepass")).hexdigest()[:n]


def _sanitised(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9.-]+", "-", text).strip(".-")


def _identity(tube, section) -> str:
    # NUL separates the parts: it cannot occur in a name, so (X, A) and (X_A, None) differ
    return f"{tube}\x00{section or ''}"


def unit_stem(tube, section=None, *, hash_chars: int = _HASH_CHARS) -> str:
    """The file stem of one unit.

    Parameters
    ----------
    tube : str
        Tube name (any text).
    section : str or None
        Section name; None or empty for a single-section tube.
    hash_chars : int
        Length of the hash added to a name that had to be changed.

    Returns
    -------
    str
        ``tube`` or ``tube_section`` when both parts are plain (``[A-Za-z0-9.-]``, starting
        with a letter or digit), else the sanitised stem followed by ``~`` and a hash of the
        exact (tube, section); at most :data:`MAX_STEM` characters, ASCII only.
    """
    tube = str(tube)
    section = "" if section is None else str(section)
    parts = [tube] + ([section] if section else [])
    stem = "_".join(parts)
    if all(_PLAIN.fullmatch(p) for p in parts) and len(stem) <= MAX_STEM:
        return stem
    tag = "~" + _hash(_identity(tube, section), hash_chars)
    base = "_".join(s for s in (_sanitised(p) for p in parts) if s) or "unit"
    return base[: MAX_STEM - len(tag)] + tag


def unit_stems(units: Iterable[tuple]) -> list[str]:
    """Stems for the (tube, section) pairs of one run, all different even when compared
    without letter case.

    A stem that would clash with an earlier one (same letters in another case, or a hash
    collision) gets a longer hash; the same identity given twice gets ``-2``, ``-3`` ...
    """
    out: list[str] = []
    seen: set[str] = set()
    count: dict[str, int] = {}
    for tube, section in units:
        ident = _identity(tube, section)
        count[ident] = count.get(ident, 0) + 1
        stem = unit_stem(tube, section)
        if stem.casefold() in seen:
            stem = unit_stem(tube, section, hash_chars=16)
            if not stem.endswith(_hash(ident, 16)):  # a plain name: add the hash now
                tag = "~" + _hash(ident, 16)
                stem = stem[: MAX_STEM - len(tag)] + tag
        k = count[ident]
        base = stem
        while stem.casefold() in seen:
            stem = f"{base}-{k}"
            k += 1
        seen.add(stem.casefold())
        out.append(stem)
    return out


def _reason(e: OSError) -> str:
    if e.errno == errno.ENAMETOOLONG:
        return "the name is too long for the file system"
    return e.strerror or str(e)


def prepare_folder(folder) -> Path:
    """Create ``folder`` (and its parents) if needed and return it.

    Raises
    ------
    OutputError
        If the folder cannot be created or the path is a file.
    """
    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except FileExistsError:
        if folder.is_symlink():
            raise OutputError(folder, "is a symbolic link to a missing folder") from None
        raise OutputError(folder, "is a file, not a folder") from None
    except NotADirectoryError:
        raise OutputError(folder, "cannot create the folder: part of the path is a file") from None
    except OSError as e:
        raise OutputError(folder, f"cannot create the folder: {_reason(e)}") from None
    if not folder.is_dir():
        raise OutputError(folder, "is not a folder")
    return folder


def _umask() -> int:
    old = os.umask(0o022)
    os.umask(old)
    return old


def write_atomic(path, content: str | bytes | Callable) -> Path:
    """Write ``content`` to ``path`` atomically.

    Parameters
    ----------
    path : path-like
        The target file.  Its folder must exist.  If the target is a symbolic link, the
        link is replaced by the new file (nothing is written through it).
    content : str, bytes or callable
        Text (written as UTF-8), bytes, or a function given the open binary file.

    Returns
    -------
    Path
        ``path``.

    Raises
    ------
    OutputError
        Naming ``path``: the target is a folder, the folder is missing or not writable,
        the name is too long, the disk is full ...  The old file, if any, is left as it was.
    """
    path = Path(path)
    folder = path.parent
    try:
        if stat.S_ISDIR(os.lstat(path).st_mode):
            raise OutputError(path, "is a folder; give a file name")
    except FileNotFoundError:
        pass
    except OSError as e:
        raise OutputError(path, f"cannot write: {_reason(e)}") from None
    try:
        fd, tmp = tempfile.mkstemp(dir=folder, prefix=".platebook-", suffix=".tmp")
    except OSError as e:
        raise OutputError(path, f"cannot write: {_reason(e)}") from None
    try:
        os.fchmod(fd, 0o666 & ~_umask())
        with os.fdopen(fd, "wb") as fh:
            if callable(content):
                content(fh)
            else:
                fh.write(content.encode("utf-8") if isinstance(content, str) else bytes(content))
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException as e:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        if isinstance(e, OSError):
            if isinstance(e, IsADirectoryError):
                raise OutputError(path, "is a folder; give a file name") from None
            raise OutputError(path, f"cannot write: {_reason(e)}") from None
        raise
    _sync_folder(folder)
    return path


def _sync_folder(folder: Path) -> None:
    # makes the rename itself durable; some file systems cannot open a folder for this
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


def plot_path(path) -> tuple[Path, str]:
    """The file a plot is really written to, and its format.

    A path without a suffix gets ``.png`` (as matplotlib would add); ``.png``, ``.pdf`` and
    ``.svg`` keep theirs; any other suffix is an :class:`OutputError`.
    """
    path = Path(path)
    suffix = path.suffix.lower().lstrip(".")
    if not suffix:
        return path.with_name(path.name + ".png"), "png"
    if suffix not in PLOT_FORMATS:
        raise OutputError(path, f"cannot save a plot as '.{shown(suffix)}'; use "
                                + ", ".join("." + f for f in PLOT_FORMATS))
    return path, suffix
