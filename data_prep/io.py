"""Atomic writes: a temporary file in the target folder, then a rename.

Readers never see a half-written file, and an interrupted write leaves the
previous file (if any) untouched.  Stored state is Parquet, CSV, JSON, TOML or
netCDF; never pickle.
"""

from __future__ import annotations

import contextlib
import json
import os
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path

import pandas as pd

from liftpool.data_prep.errors import InputError

__all__ = ["atomic_path", "atomic_folder", "ensure_room", "ROOM_MARGIN_BYTES", "write_table", "write_json", "write_text", "read_table", "read_user_table", "file_sha256",
           "input_sha256", "spreadsheet_safe", "FORMULA_STARTS"]


def _umask() -> int:
    """The process's umask (read by setting it and putting it back)."""
    mask = os.umask(0)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success rename it over ``path``.

    The file gets the permissions any new file gets (0644 under the usual umask), not the temporary
    file's private 0600.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        os.chmod(tmp_path, 0o666 & ~_umask())
        os.replace(tmp_path, path)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()


@contextlib.contextmanager
def atomic_folder(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a hidden staging folder beside ``path``; on success rename it to ``path``.

    ``path`` must not exist or be empty (nothing is ever written over).  On any
    error, or an interrupt, the staging folder is removed and ``path`` is untouched.
    """
    import shutil

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent))
    os.chmod(tmp, 0o777 & ~_umask())
    try:
        yield tmp
        if path.exists():
            path.rmdir()
        os.rename(tmp, path)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)


#: Free space kept in hand beyond what a write is expected to need.
ROOM_MARGIN_BYTES = 4 * 2**20


def ensure_room(path: str | os.PathLike, need_bytes: int = 0) -> None:
    """Refuse, before anything is written, an output place that is read-only or short of space.

    ``path`` is the file or folder to be written (it need not exist yet); its nearest existing folder
    is tried with a temporary file and its free space compared with ``need_bytes`` plus
    :data:`ROOM_MARGIN_BYTES`.  A full disk found in the middle of writing an HDF5 file can crash
    the writer outright (a segmentation fault in h5py), so fits check before writing.

    Raises
    ------
    InputError
        Naming the folder, what was found, and the fix (exit 2).
    """
    import shutil

    place = Path(path).absolute().parent
    while not place.exists() and place != place.parent:
        place = place.parent
    try:
        with tempfile.TemporaryFile(dir=place):
            pass
    except OSError as exc:
        raise InputError(problem=f"cannot write in {place}: {exc.strerror or exc}", file=str(path),
                         fix="choose an output place on a disk you can write to") from None
    free = shutil.disk_usage(place).free
    if free < need_bytes + ROOM_MARGIN_BYTES:
        raise InputError(problem=f"not enough free space in {place}: {free / 2**20:,.1f} MB free, about "
                                 f"{(need_bytes + ROOM_MARGIN_BYTES) / 2**20:,.1f} MB needed",
                         file=str(path), fix="free some space on that disk, or choose an output place on another")


def _write(path: str | os.PathLike, writer: Callable[[Path], None]) -> Path:
    with atomic_path(path) as tmp:
        writer(tmp)
    return Path(path)


def write_table(df: pd.DataFrame, path: str | os.PathLike) -> Path:
    """Write a DataFrame as Parquet or CSV (by extension), atomically."""
    name = str(path).lower()
    if name.endswith((".parquet", ".pq")):
        return _write(path, lambda p: df.to_parquet(p, index=False))
    if name.endswith(".csv"):
        return _write(path, lambda p: df.to_csv(p, index=False))
    raise ValueError(f"unsupported table extension: {path}")


def read_table(path: str | os.PathLike) -> pd.DataFrame:
    """Read a Parquet or CSV table (by extension)."""
    name = str(path).lower()
    if name.endswith((".parquet", ".pq")):
        return pd.read_parquet(path)
    return pd.read_csv(path, keep_default_na=False, na_values=[""])


def read_user_table(path: str | os.PathLike, what: str, header: str) -> pd.DataFrame:
    """A small user-given table (CSV or Parquet), every reading failure one :class:`InputError`.

    ``what`` names the file in messages ("spend file"); ``header`` is the header to suggest for an
    empty file.
    """
    p = Path(path)
    if not p.is_file():
        raise InputError(problem="file not found", file=str(p), fix=f"check the path of the {what}")
    if p.stat().st_size == 0:
        raise InputError(problem="the file is empty", file=str(p), fix=f"write a header ({header}) and one row each")
    try:
        return read_table(p)
    except UnicodeDecodeError as exc:
        raise InputError(problem=f"the file is not UTF-8 text (byte {exc.start})", file=str(p),
                         fix=f"save the {what} as UTF-8 CSV (or Parquet)") from None
    except Exception as exc:  # noqa: BLE001 - any reader failure is bad input
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(problem=f"cannot read the file: {first}", file=str(p),
                         fix="check that it is a valid CSV or Parquet file") from None


def write_json(obj, path: str | os.PathLike) -> Path:
    text = json.dumps(obj, indent=2, sort_keys=False, default=_json_default)
    return write_text(text + "\n", path)


def write_text(text: str, path: str | os.PathLike) -> Path:
    return _write(path, lambda p: p.write_text(text, encoding="utf-8"))


def _json_default(o):
    import numpy as np

    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return float(o)
    if isinstance(o, (np.ndarray, tuple, set)):
        return list(o)
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"not JSON serializable: {type(o)}")


def file_sha256(path: str | os.PathLike) -> str:
    """SHA-256 of a file, read in 1 MiB blocks."""
    import hashlib

    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def input_sha256(inputs) -> dict[str, str]:
    """SHA-256 of every local input file, keyed ``"<kind>[<n>] <file name>"`` (the one key format of the
    prep summary's provenance, from the command line and from a workspace alike).

    Parameters
    ----------
    inputs : mapping
        Input kind (impressions, conversions, ...) to a path, a list of paths, or None. Remote paths
        (``scheme://``, read by Spark) and folders are not hashed.
    """
    out = {}
    for kind, v in inputs.items():
        if v is None:
            continue
        for n, p in enumerate(v if isinstance(v, (list, tuple)) else [v]):
            if "://" not in str(p) and Path(p).is_file():
                out[f"{kind}[{n}] {Path(p).name}"] = file_sha256(p)
    return out


#: A text cell starting with one of these is a formula to a spreadsheet (OWASP, "CSV Injection").
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def spreadsheet_safe(df: pd.DataFrame) -> pd.DataFrame:
    """A copy whose text cells cannot run as spreadsheet formulas: a leading ``'`` before any text that
    starts with :data:`FORMULA_STARTS` (numbers are left alone).

    For the tables people open (reports, screens, comparisons); data files that liftpool reads back
    (counts tables) keep their values exactly.
    """
    out = df.copy()
    for col in out.columns:
        if out[col].dtype == object or pd.api.types.is_string_dtype(out[col]):
            out[col] = out[col].map(lambda v: "'" + v if isinstance(v, str) and v.startswith(FORMULA_STARTS) else v)
    out.columns = ["'" + c if isinstance(c, str) and c.startswith(FORMULA_STARTS) else c for c in out.columns]
    return out
