"""NumPy files read as plain data: nothing is unpickled, every header is checked first.

:func:`read_arrays` reads ``.npy`` / ``.npz`` files: every array header is checked
(numeric or text type, size within the memory cap) before its data is read, and a
damaged file (truncated, bad checksum, not a zip) is one line naming the file.
:func:`read_start_design` carries the design of an earlier run to a new grid
(``optimize.start_from``).

The results folder (:mod:`topopt.results`), ``buttress inspect`` and the optimisation
loop build on this module; it sits in the foundation layer so that the loop can read a
start design without importing the results folder (which imports the loop).
"""

from __future__ import annotations

import math
import zipfile
import zlib
from collections.abc import Iterable
from pathlib import Path

import numpy as np

from topopt.grid import resample


class ResultsError(ValueError):
    """A results folder or array file that cannot be used; the message is one line.

    Defined here, below the optimisation loop, because the loop reads start designs
    with :func:`read_arrays`; :mod:`topopt.results` raises it for whole folders.
    """


def _memory_cap() -> int:
    from topopt.memory import memory_cap

    return memory_cap()


def _read_npy(handle, where: str, cap: int) -> np.ndarray:
    """Read one ``.npy`` stream: header checked before a byte of data is read."""
    fmt = np.lib.format
    version = fmt.read_magic(handle)
    if version == (1, 0):
        shape, fortran, dtype = fmt.read_array_header_1_0(handle)
    elif version in ((2, 0), (3, 0)):
        shape, fortran, dtype = fmt.read_array_header_2_0(handle)
    else:
        raise ValueError(f"unsupported .npy version {version}")
    if dtype.hasobject or dtype.fields is not None or dtype.subdtype is not None:
        raise ValueError("holds Python objects or records, not plain numbers")
    if dtype.kind not in "biufU":
        raise ValueError(f"holds {dtype} values, not numbers or text")
    if len(shape) > 8:
        raise ValueError(f"has {len(shape)} dimensions")
    count = math.prod(int(n) for n in shape)
    nbytes = count * dtype.itemsize
    if nbytes > cap:
        raise ValueError(f"declares shape {tuple(shape)} ({nbytes / 2**30:.3g} GiB), more than "
                         f"the memory cap of {cap / 2**30:.3g} GiB")
    data = handle.read(nbytes)
    if len(data) != nbytes:
        raise ValueError(f"cut short ({len(data)} of {nbytes} bytes)")
    if handle.read(1):
        raise ValueError("has data after the array")
    array = np.frombuffer(data, dtype=dtype).reshape(shape, order="F" if fortran else "C")
    return array.copy()


def read_arrays(path: str | Path, names: Iterable[str] | None = None) -> dict[str, np.ndarray]:
    """Read a ``.npz`` (every member, or ``names``) or ``.npy`` (as ``"array"``) file.

    Nothing is unpickled; every array header is checked before its data is read.

    Raises
    ------
    ResultsError
        One line naming the file (and array) for a missing, damaged or unsuitable file.

    Examples
    --------
    >>> # read_arrays("out/result.npz", ["density"])["density"].shape
    """
    path = Path(path)
    cap = _memory_cap()
    wanted = None if names is None else list(names)
    try:
        with open(path, "rb") as handle:
            magic = handle.read(6)
            handle.seek(0)
            if magic == b"\x93NUMPY":
                return {"array": _read_npy(handle, str(path), cap)}
            if not magic.startswith(b"PK"):
                raise ResultsError(f"{path}: not a NumPy .npy or .npz file")
            out: dict[str, np.ndarray] = {}
            with zipfile.ZipFile(handle) as archive:
                members = {n[:-4] if n.endswith(".npy") else n: n for n in archive.namelist()}
                for name in (wanted if wanted is not None else list(members)):
                    if name not in members:
                        raise ResultsError(f"{path}: no array named {name!r} (holds "
                                           f"{', '.join(members) or 'nothing'})")
                    try:
                        with archive.open(members[name]) as member:
                            out[name] = _read_npy(member, f"{path}:{name}", cap)
                    except ResultsError:
                        raise
                    except (ValueError, EOFError, zlib.error, zipfile.BadZipFile,
                            NotImplementedError) as exc:
                        raise ResultsError(f"{path}: array {name!r} is damaged or unsuitable "
                                           f"({exception_text(exc)})") from None
            return out
    except ResultsError:
        raise
    except FileNotFoundError:
        raise ResultsError(f"{path}: file not found") from None
    except IsADirectoryError:
        raise ResultsError(f"{path}: is a folder, expected a .npy or .npz file") from None
    except (OSError, ValueError, EOFError, zlib.error, zipfile.BadZipFile,
            NotImplementedError, RuntimeError) as exc:
        raise ResultsError(f"{path}: not a readable NumPy file ({exception_text(exc)})") from None


def exception_text(exc: BaseException) -> str:
    """An exception's message on one line (its type name when it has none)."""
    return " ".join(str(exc).split()) or type(exc).__name__


#: Largest spread of the per-axis scale factors between a start design's grid and the
#: problem's grid (rounding the element counts of the same domain stays well inside it).
START_SHAPE_SPREAD = 0.1


def read_start_design(path: str | Path, shape: tuple[int, ...]) -> np.ndarray:
    """The design variables of an earlier run, carried over to a grid of ``shape``.

    ``path`` is a results folder or its ``result.npz``; its ``design`` array must
    describe the same domain on any grid: the same number of axes, and per-axis scale
    factors that agree within :data:`START_SHAPE_SPREAD`. Values are interpolated
    (:func:`topopt.grid.resample`) and clipped to [0, 1].

    Raises
    ------
    ResultsError
        One line naming the file for a missing, damaged or unsuitable design.
    """
    path = Path(path)
    file = path / "result.npz" if path.is_dir() else path
    design = read_arrays(file, ["design"])["design"]
    if design.dtype.kind not in "biuf":
        raise ResultsError(f"{file}: the design holds {design.dtype} values, not numbers")
    shape = tuple(int(n) for n in shape)
    if design.ndim != len(shape) or 0 in design.shape:
        raise ResultsError(f"{file}: the design has shape {design.shape}, expected "
                           f"{len(shape)} axes like the domain {shape}")
    design = design.astype(float)
    if not np.all(np.isfinite(design)):
        raise ResultsError(f"{file}: the design holds NaN or infinite values")
    factors = [new / old for new, old in zip(shape, design.shape, strict=True)]
    if max(factors) > (1.0 + START_SHAPE_SPREAD) * min(factors):
        raise ResultsError(f"{file}: a design of shape {design.shape} does not cover the "
                           f"domain {shape} (axes scaled by "
                           f"{', '.join(f'{f:.3g}' for f in factors)}; expected one factor)")
    return np.clip(resample(design, shape), 0.0, 1.0)
