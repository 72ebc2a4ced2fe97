"""Atomic file writing: write to a temporary name in the same folder, then rename.

An interrupted run never leaves a half-written file under the final name. The writers
of results folders (:mod:`topopt.export`), meshes (:mod:`topopt.surface`) and reports
build on :func:`atomic_write`.
"""

from __future__ import annotations

import io
import os
import tempfile
from collections.abc import Callable
from pathlib import Path


def atomic_write(path: str | Path, write: Callable[[io.BufferedWriter], None]) -> None:
    """Write a file by calling ``write(handle)`` on a temporary file, then rename it.

    Examples
    --------
    >>> target = Path("sub") / "note.txt"
    >>> atomic_write(target, lambda h: h.write(b"done"))
    >>> target.read_text(), sorted(p.name for p in target.parent.iterdir())
    ('done', ['note.txt'])
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as handle:
            write(handle)
        # mkstemp creates the file private (0600); results are ordinary files
        os.chmod(tmp, 0o666 & ~_umask())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask
