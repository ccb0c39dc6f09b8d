"""Reading tables from files, with errors that say what is wrong with the file."""

from __future__ import annotations

import os
import stat
from pathlib import Path

import pandas as pd

from ..core.errors import PanelDataError

__all__ = ["read_table", "parquet_files", "regular_file"]

PARQUET_SUFFIXES = (".parquet", ".pq", ".parq")


def parquet_files(folder) -> list[Path]:
    """The Parquet files in a folder and its sub-folders (hidden and ``_``-prefixed
    names, which Parquet writers use for metadata, are skipped); a folder without any is a
    :class:`PanelDataError` naming what it holds instead."""
    folder = Path(folder)
    files = sorted(f for f in folder.rglob("*") if f.suffix.lower() in PARQUET_SUFFIXES
                   and f.is_file()  # a pipe or device named x.parquet is never read
                   and not any(part.startswith((".", "_"))
                               for part in f.relative_to(folder).parts))
    if not files:
        others = sorted(f.name for f in folder.iterdir())[:5]
        held = f"; it holds {', '.join(map(repr, others))}" if others else "; it is empty"
        raise PanelDataError(
            f"folder {str(folder)!r} holds no Parquet files "
            f"({', '.join(PARQUET_SUFFIXES)}){held}")
    return files


def regular_file(path, what: str = "file", error=PanelDataError, folder: bool = False) -> Path:
    """``path`` as a :class:`~pathlib.Path` if it is a regular file we may read (or, with
    ``folder=True``, a folder); otherwise ``error`` naming it.

    Devices, pipes and sockets are refused before anything opens them: reading
    ``/dev/zero`` or a FIFO would never end. Symbolic links are followed.
    """
    path = Path(path)
    try:
        st = path.stat()
    except FileNotFoundError:
        raise error(f"{what} {str(path)!r} does not exist") from None
    except OSError as exc:  # permission denied on a parent folder, a name too long, ...
        raise error(f"cannot read {what} {str(path)!r}: {exc.strerror or exc}") from None
    if stat.S_ISDIR(st.st_mode) and folder:
        kind_ok = os.access(path, os.R_OK | os.X_OK)
    elif stat.S_ISREG(st.st_mode):
        kind_ok = os.access(path, os.R_OK)
    else:
        kind = "a folder" if stat.S_ISDIR(st.st_mode) else "not a regular file (a device, " \
            "pipe or socket)"
        raise error(f"{what} {str(path)!r} is {kind}; give a regular file")
    if not kind_ok:
        raise error(f"cannot read {what} {str(path)!r}: permission denied")
    return path


def read_table(path, sep: str | None = None, encoding: str = "utf-8") -> pd.DataFrame:
    """Read a CSV (``.csv``, ``.txt``, ``.tsv``) or Parquet (``.parquet``, ``.pq``) file.

    Raises :class:`PanelDataError` for a missing or empty file, text that is not in the
    given encoding, a table with a single column (usually the wrong delimiter), and
    unreadable Parquet.
    """
    path = regular_file(path, folder=True)
    if path.is_file() and path.stat().st_size == 0:
        raise PanelDataError(f"file {str(path)!r} is empty")
    suffix = path.suffix.lower()
    if suffix in PARQUET_SUFFIXES or path.is_dir():
        if path.is_dir():
            parquet_files(path)
        if sep is not None:
            raise PanelDataError(f"{str(path)!r} is Parquet; a delimiter applies to CSV files")
        try:
            return pd.read_parquet(path)
        except Exception as exc:  # pyarrow raises several types
            raise PanelDataError(f"cannot read Parquet {str(path)!r}: {exc}") from None
    if sep is None:
        sep = "\t" if suffix == ".tsv" else ","
    try:
        df = pd.read_csv(path, sep=sep, encoding=encoding)
    except UnicodeDecodeError as exc:
        raise PanelDataError(
            f"file {str(path)!r} is not valid {encoding} text (byte {exc.start}); save it as "
            f"UTF-8 or pass the right encoding"
        ) from None
    except pd.errors.EmptyDataError:
        raise PanelDataError(f"file {str(path)!r} has no table in it") from None
    except pd.errors.ParserError as exc:
        raise PanelDataError(f"cannot parse {str(path)!r} as delimited text: {exc}") from None
    except OSError as exc:  # permissions changed after the check, an I/O error
        raise PanelDataError(f"cannot read {str(path)!r}: {exc.strerror or exc}") from None
    if df.shape[1] == 1:
        only = str(df.columns[0])
        guess = next((d for d in (";", "\t", "|", ",") if d in only and d != sep), None)
        hint = (f"; the header contains {guess!r}, try that delimiter (--delimiter "
                f"{'tab' if guess == chr(9) else repr(guess)})" if guess else "")
        raise PanelDataError(
            f"file {str(path)!r} read as a single column {only[:60]!r} with delimiter "
            f"{sep!r}{hint}"
        )
    if len(df) == 0:
        raise PanelDataError(f"file {str(path)!r} has a header but no rows")
    return df
