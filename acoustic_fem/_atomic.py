"""Atomic file output: write to a temporary sibling, then rename into place."""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path

from ._errors import AcousticFemError

__all__ = ["OutputExistsError", "atomic_path", "atomic_folder"]


class OutputExistsError(AcousticFemError, FileExistsError):
    """An output file or folder exists and overwriting was not asked for."""


@contextlib.contextmanager
def atomic_path(path, *, overwrite: bool = False):
    """Yield a temporary path beside ``path``; on success rename it to ``path``.

    The destination is never left half-written: on any error the temporary
    file is removed and an existing destination is untouched.
    """
    dest = Path(path)
    if dest.exists() and not overwrite:
        raise OutputExistsError(
            f"{dest} exists; pass overwrite=True (or --force on the command line) to replace it."
        )
    if not dest.parent.exists():
        raise AcousticFemError(f"folder {dest.parent} does not exist; create it first.")
    fd, tmp = tempfile.mkstemp(prefix=f".{dest.name}.", suffix=".part", dir=dest.parent)
    os.close(fd)
    try:
        yield Path(tmp)
        os.replace(tmp, dest)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


@contextlib.contextmanager
def atomic_folder(path, *, overwrite: bool = False):
    """Yield a temporary folder beside ``path``; on success move it to ``path``.

    An interrupted or failed run leaves no partial results folder; an
    existing folder is replaced only with ``overwrite=True`` (and only once
    the new one is complete).
    """
    import shutil

    dest = Path(path)
    if dest.exists() and not overwrite:
        raise OutputExistsError(
            f"{dest} exists; pass overwrite=True (or --force on the command line) to replace it."
        )
    parent = dest.absolute().parent
    parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{dest.name}.", suffix=".part", dir=parent))
    try:
        yield tmp
        if dest.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{dest.name}.", suffix=".old", dir=parent))
            os.replace(dest, old / "x")
            os.replace(tmp, dest)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, dest)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
