"""Atomic output folders: written whole, or not at all."""

from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path

from spatial_ev.errors import InputError

__all__ = ["atomic_folder"]


@contextlib.contextmanager
def atomic_folder(path: str | os.PathLike, *, overwrite: bool = False) -> Iterator[Path]:
    """Yield a temporary folder that replaces ``path`` only if the block succeeds.

    The temporary folder sits beside the target (same file system, so the final rename is
    atomic). On any exception it is removed and ``path`` is left as it was. An existing
    ``path`` is replaced only with ``overwrite=True``.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> target = pathlib.Path(tempfile.mkdtemp()) / "out"
    >>> with atomic_folder(target) as tmp:
    ...     _ = (tmp / "a.txt").write_text("x")
    >>> (target / "a.txt").read_text()
    'x'
    """
    target = Path(path)
    if target.exists() and not overwrite:
        raise InputError(f"output folder {str(target)!r} already exists; choose another "
                         f"folder or pass --overwrite")
    if target.exists() and not target.is_dir():
        raise InputError(f"output path {str(target)!r} exists and is not a folder")
    parent = target.parent if str(target.parent) else Path(".")
    if not parent.exists():
        raise InputError(f"the folder {str(parent)!r} that should hold {target.name!r} "
                         f"does not exist; create it first")
    tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.partial-", dir=parent))
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o777 & ~umask)  # mkdtemp makes 0700; give the folder ordinary permissions
    try:
        yield tmp
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    old = None
    if target.exists():
        old = Path(tempfile.mkdtemp(prefix=f".{target.name}.old-", dir=parent))
        old.rmdir()
        target.rename(old)
    tmp.rename(target)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
