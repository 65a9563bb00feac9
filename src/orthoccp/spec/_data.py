"""Panel data files: CSV or Parquet, chosen by suffix."""

from __future__ import annotations

import importlib.util
import os
from pathlib import Path
from collections.abc import Sequence
from typing import Any, Literal

import pandas as pd

from .._errors import InputError
from ..data import Panel

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


def read_data(
    path: str | os.PathLike[str], *, columns: Sequence[str] | None = None
) -> pd.DataFrame:
    """Read a panel file: CSV (optionally compressed) by pandas, Parquet by pandas + pyarrow.

    The one file reader of the package: the command line reads its data through it, and
    :func:`read_panel` reads only the columns a panel uses with ``columns=``.

    Parameters
    ----------
    path : path-like
        ``.csv`` (also ``.csv.gz`` etc.) or ``.parquet`` / ``.pq``.
    columns : sequence of str, optional
        Read only these columns, in this order (duplicates once): a wide file then costs
        only the memory of the columns asked for. Parquet is read column by column through
        pyarrow and handed to pandas without a second copy (``self_destruct``, one block per
        column); CSV through pandas' ``usecols``. By default every column is read.

    Returns
    -------
    pandas.DataFrame

    Raises
    ------
    FileNotFoundError
        When the file does not exist.
    orthoccp.InputError
        For an unsupported extension, a missing pyarrow, a column of ``columns`` not in the
        file (the message lists the file's columns), or a file pandas cannot parse.
    """
    p = Path(path)
    fmt = data_format(p)
    if not p.is_file():
        if p.is_dir():
            raise InputError(f"data file {str(p)!r} is a folder, not a file.")
        raise FileNotFoundError(2, "data file not found", str(p))
    wanted = None if columns is None else _available(p, fmt, columns)
    if fmt == "parquet":
        try:
            if wanted is None:
                return pd.read_parquet(p, engine="pyarrow")
            import pyarrow.parquet as pq

            table = pq.read_table(p, columns=wanted, memory_map=True)
        except (OSError, ValueError) as exc:  # pyarrow's errors derive from these
            raise InputError(f"could not read Parquet file {str(p)!r}: {exc}") from exc
        frame = table.to_pandas(self_destruct=True, split_blocks=True)
        del table
        return frame[wanted]
    if wanted is None:
        return read_csv_named(p)
    return read_csv_named(p, usecols=wanted)[wanted]


def _available(path: Path, fmt: str, columns: Sequence[str]) -> list[str]:
    """``columns`` without duplicates, checked against the file's header."""
    if isinstance(columns, str):
        columns = [columns]
    wanted = list(dict.fromkeys(str(c) for c in columns))
    if fmt == "parquet":
        import pyarrow.parquet as pq

        try:
            names = list(pq.read_schema(path).names)
        except (OSError, ValueError) as exc:
            raise InputError(f"could not read Parquet file {str(path)!r}: {exc}") from exc
    else:
        names = [str(c) for c in read_csv_named(path, nrows=0).columns]
    missing = [c for c in wanted if c not in names]
    if missing:
        shown = ", ".join(names[:12]) + (" ..." if len(names) > 12 else "")
        raise InputError(
            f"column(s) {', '.join(map(repr, missing))} are not in {str(path)!r}; the file "
            f"has: {shown}."
        )
    return wanted


def read_panel(
    path: str | os.PathLike[str],
    *,
    unit: str,
    period: str,
    choice: str,
    states: Sequence[str],
    extra_columns: Sequence[str] = (),
    missing: Literal["error", "drop"] = "error",
) -> Panel:
    """A :class:`~orthoccp.Panel` from the columns of a file that it uses, and no others.

    Parameters
    ----------
    path : path-like
        CSV or Parquet file (see :func:`read_data`).
    unit, period, choice, states, extra_columns, missing
        As for :class:`~orthoccp.Panel`; ``extra_columns`` should name the utility columns of
        the model that are not states, so that they are read too.

    Returns
    -------
    Panel

    Notes
    -----
    Reads ``[unit, period, choice, *states, *extra_columns]`` with :func:`read_data`, wraps
    them and then returns the memory pyarrow's allocator keeps after the Parquet columns are
    freed (the panel holds its own state matrix; measured: 400 MB held at 10^6 rows x 50
    states otherwise).

    Examples
    --------
    >>> from orthoccp import read_panel  # doctest: +SKIP
    >>> panel = read_panel("bikes.parquet", unit="bike", period="week", choice="action",
    ...                    states=["wear", "x0", "x1"], extra_columns=["wear_scaled"])  # doctest: +SKIP
    """
    if isinstance(states, str):
        states = [states]
    if isinstance(extra_columns, str):
        extra_columns = [extra_columns]
    frame = read_data(path, columns=[unit, period, choice, *states, *extra_columns])
    panel = Panel(frame, unit=unit, period=period, choice=choice, states=list(states),
                  missing=missing, extra_columns=list(extra_columns))
    del frame
    release_arrow_memory()
    return panel


def release_arrow_memory() -> None:
    """Return the memory pyarrow's allocator keeps after Parquet columns were freed."""
    try:
        import pyarrow as pa
    except ImportError:
        return
    pa.default_memory_pool().release_unused()


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

