"""Files of the command line: reading data tables, checking and writing output files.

Data are read with pandas, chosen by the file's suffix (``.csv``, or ``.parquet`` through
pyarrow); every problem reading them becomes a :class:`~mcexact.FileFormatError` naming the file.
Output files are checked before a long run starts (so a mistyped folder does not cost the run)
and written atomically: to a temporary file in the same folder, then moved over the target with
:func:`os.replace`, so an interrupted write never leaves a half-written file.
"""

from __future__ import annotations

import errno
import os
from pathlib import Path

import pandas as pd

from mcexact._exceptions import DataError, FileFormatError
from mcexact._files import write_text_atomic

__all__ = ["DATA_SUFFIXES", "read_table", "check_output_paths", "write_text_atomic"]

#: Suffixes of the data files the command line reads, and how each is read.
DATA_SUFFIXES = {".csv": "CSV", ".parquet": "Parquet"}


def read_table(path: str | os.PathLike) -> pd.DataFrame:
    """The data table in `path`, a ``.csv`` or ``.parquet`` file.

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    pandas.DataFrame

    Raises
    ------
    FileFormatError
        If the file is missing or unreadable, has another suffix, cannot be parsed, or holds no
        rows; or, for Parquet, if pyarrow is not installed (the message says how to install it).
    """
    file = Path(path)
    kind = DATA_SUFFIXES.get(file.suffix.lower())
    if kind is None:
        raise FileFormatError(f"{file}: unknown data file type {file.suffix or '(no suffix)'!r}; "
                              f"give a {' or '.join(DATA_SUFFIXES)} file")
    if not file.exists():
        raise FileFormatError(f"{file}: no such file")
    if file.is_dir():
        raise FileFormatError(f"{file}: is a folder, not a data file")
    try:
        frame = _read_csv(file) if kind == "CSV" else _read_parquet(file)
    except FileFormatError:
        raise
    except OSError as exc:
        raise FileFormatError(f"{file}: cannot read the file ({exc.strerror or exc})") from exc
    except Exception as exc:   # parsers raise many types (pandas, pyarrow, codecs)
        raise FileFormatError(f"{file}: not a readable {kind} file ({_first_line(exc)})") from exc
    if frame.shape[0] == 0:
        raise FileFormatError(f"{file}: the file holds no data rows")
    return frame


def _read_csv(file: Path) -> pd.DataFrame:
    try:
        return pd.read_csv(file)
    except pd.errors.EmptyDataError as exc:
        raise FileFormatError(f"{file}: the file is empty") from exc


def _read_parquet(file: Path) -> pd.DataFrame:
    try:
        import pyarrow  # noqa: F401  (pandas' Parquet engine)
    except ImportError as exc:
        raise FileFormatError(f"{file}: reading Parquet files needs pyarrow: pip install pyarrow "
                              "(or pip install 'mcexact[parquet]')") from exc
    if file.stat().st_size == 0:
        raise FileFormatError(f"{file}: the file is empty")
    return pd.read_parquet(file, engine="pyarrow")


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def check_output_paths(paths: dict) -> None:
    """Check, before any work, that every output file can be written.

    Parameters
    ----------
    paths : dict
        Option name (as the user typed it, e.g. ``"--json"``) -> path, or None when not asked for.

    Raises
    ------
    DataError
        If two options name the same file.
    OSError
        If a file's folder does not exist or is not writable, or the path is a folder
        (``filename`` is the path as given).
    """
    seen = {}
    for option, path in paths.items():
        if path is None:
            continue
        target = Path(path)
        key = os.path.normcase(os.path.abspath(target))
        if key in seen:
            raise DataError(f"{seen[key]} and {option} name the same file {str(target)!r}")
        seen[key] = option
        folder = target.parent
        if target.is_dir():
            raise IsADirectoryError(errno.EISDIR, f"{option} names a folder, not a file",
                                    str(target))
        if not folder.is_dir():
            raise FileNotFoundError(errno.ENOENT, f"folder {str(folder)!r} does not exist "
                                    f"(for {option})", str(target))
        if not os.access(folder, os.W_OK | os.X_OK):
            raise PermissionError(errno.EACCES, f"folder {str(folder)!r} is not writable "
                                  f"(for {option})", str(target))
