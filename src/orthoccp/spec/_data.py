"""Panel data files: CSV or Parquet, chosen by suffix."""

from __future__ import annotations

import importlib.util
import os
from pathlib import Path
from typing import Any

import pandas as pd

from .._errors import InputError

CSV_SUFFIXES = (".csv", ".csv.gz", ".csv.bz2", ".csv.xz", ".csv.zip")
PARQUET_SUFFIXES = (".parquet", ".pq")


# --------------------------------------------------------------------------- data files
def data_format(path: str | os.PathLike[str], *, writing: bool = False) -> str:
    """The format of a data file, from its extension, checked to be readable or writable.

    Parameters
    ----------
    path : path-like
        Data file name.
    writing : bool, default=False
        Word the pyarrow message for writing rather than reading.

    Returns
    -------
    {"csv", "parquet"}

    Raises
    ------
    orthoccp.InputError
        For an unsupported extension, or a Parquet file when pyarrow is not installed.
    """
    p = Path(path)
    name = p.name.lower()
    if name.endswith(CSV_SUFFIXES):
        return "csv"
    if name.endswith(PARQUET_SUFFIXES):
        if importlib.util.find_spec("pyarrow") is None:
            action = "writing" if writing else "reading"
            raise InputError(
                f"{action} the Parquet file {str(p)!r} needs pyarrow, which is not installed; "
                f"install it with 'pip install pyarrow' (or 'pip install orthoccp[parquet]'), "
                f"or use a .csv file."
            )
        return "parquet"
    suffix = "".join(p.suffixes) or "(none)"
    raise InputError(
        f"data file {str(p)!r} has an unsupported extension {suffix!r}; use .csv or .parquet."
    )


def data_stem(path: str | os.PathLike[str]) -> Path:
    """``path`` without its data extension (``panel.csv.gz`` -> ``panel``)."""
    p = Path(path)
    name = p.name
    for suffix in sorted(CSV_SUFFIXES + PARQUET_SUFFIXES, key=len, reverse=True):
        if name.lower().endswith(suffix):
            return p.with_name(name[: -len(suffix)])
    return p.with_suffix("")


def read_data(path: str | os.PathLike[str]) -> pd.DataFrame:
    """Read a panel file: CSV (optionally compressed) by pandas, Parquet by pandas + pyarrow.

    Parameters
    ----------
    path : path-like
        ``.csv`` (also ``.csv.gz`` etc.) or ``.parquet`` / ``.pq``.

    Returns
    -------
    pandas.DataFrame

    Raises
    ------
    FileNotFoundError
        When the file does not exist.
    orthoccp.InputError
        For an unsupported extension, a missing pyarrow, or a file pandas cannot parse.
    """
    p = Path(path)
    fmt = data_format(p)
    if not p.is_file():
        if p.is_dir():
            raise InputError(f"data file {str(p)!r} is a folder, not a file.")
        raise FileNotFoundError(2, "data file not found", str(p))
    if fmt == "parquet":
        try:
            return pd.read_parquet(p, engine="pyarrow")
        except (OSError, ValueError) as exc:
            raise InputError(f"could not read Parquet file {str(p)!r}: {exc}") from exc
    return read_csv_named(p)


def read_csv_named(path: Path, **options: Any) -> pd.DataFrame:
    """``pandas.read_csv`` whose every failure is an InputError naming the file.

    Covers an empty file, broken quoting, text that is not UTF-8 and a compressed extension
    (``.csv.gz``, ``.bz2``, ``.xz``, ``.zip``) on a file that is not compressed that way.
    """
    import lzma
    import zipfile
    import zlib

    p = str(path)
    try:
        return pd.read_csv(path, **options)
    except pd.errors.EmptyDataError as exc:
        raise InputError(f"data file {p!r} is empty (no columns to read).") from exc
    except pd.errors.ParserError as exc:
        raise InputError(f"could not parse CSV file {p!r}: {exc}") from exc
    except UnicodeDecodeError as exc:
        raise InputError(f"could not read CSV file {p!r}: not UTF-8 text ({exc.reason}).") from exc
    except (EOFError, lzma.LZMAError, zipfile.BadZipFile, zlib.error, OSError) as exc:
        if isinstance(exc, OSError) and exc.errno is not None:
            raise InputError(f"could not read CSV file {p!r}: {exc.strerror}.") from exc
        compressed = Path(p).suffix.lower() in (".gz", ".bz2", ".xz", ".zip")
        hint = (f" The extension {Path(p).suffix!r} says compressed: is the file really "
                f"compressed that way? Rename a plain CSV file to .csv." if compressed else "")
        raise InputError(
            f"could not read CSV file {p!r}: {exc or type(exc).__name__}.{hint}"
        ) from exc


def write_data(frame: pd.DataFrame, path: str | os.PathLike[str]) -> Path:
    """Write a panel file, CSV or Parquet by extension (see :func:`read_data`).

    Parameters
    ----------
    frame : pandas.DataFrame
        The data; the index is not written.
    path : path-like
        Destination; its folder is created when missing.

    Returns
    -------
    pathlib.Path
        The written file.
    """
    from .._outputs import writing

    p = Path(path)
    fmt = data_format(p, writing=True)
    with writing(p):
        p.parent.mkdir(parents=True, exist_ok=True)
        if fmt == "parquet":
            frame.to_parquet(p, engine="pyarrow", index=False)
        else:
            frame.to_csv(p, index=False)
    return p

