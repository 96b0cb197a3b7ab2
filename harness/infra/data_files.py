"""Reading observations (coordinates + value) from a CSV or Parquet file, with checks.

Every problem is reported with the file, the column and, for bad values, the 1-based
data row numbers (the header is row 0), so users can fix the file.

A CSV file whose header holds no comma but one of ``;``, tab or ``|`` is read with that
separator (``csv.Sniffer`` on the file's start), and with a decimal comma when its
numbers are written ``0,5``; a warning says so, since a file meant for another program
may need a look.

It sits in the lowest layer because every stage that takes a user's file reads it here:
``check`` (the dataset under audit), the case files of ``grid`` (point sets read from a
file) and the audit of a run task built on such a point set.
"""

from __future__ import annotations

import csv
import gzip
import logging
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

_MAX_ROWS_LISTED = 10
#: Separators tried besides the comma, and how a warning names them.
OTHER_SEPARATORS = {";": "';'", "\t": "a tab", "|": "'|'"}
#: Characters of a file's start read to guess its separator.
_SAMPLE_CHARACTERS = 65536
_DECIMAL_COMMA = re.compile(r"(?:^|[;\t|])\s*-?\d+,\d+(?:[eE][-+]?\d+)?\s*(?=$|[;\t|])")

logger = logging.getLogger(__name__)


class DataFileError(ValueError):
    """A data file cannot be read or does not hold what was asked for."""


@dataclass(frozen=True)
class Observations:
    """Coordinates and values read from a file.

    Attributes
    ----------
    points : ndarray, shape (n, d)
    values : ndarray, shape (n,)
    coords : tuple of str
        Column names of the coordinates.
    value : str
        Column name of the values.
    source : str
        The file path.
    rows : ndarray of int
        1-based data-row numbers in the file of each observation kept.
    """

    points: np.ndarray
    values: np.ndarray
    coords: tuple[str, ...]
    value: str
    source: str
    rows: np.ndarray

    @property
    def n(self) -> int:
        return int(self.values.size)


def _rows_text(rows: np.ndarray) -> str:
    listed = ", ".join(str(int(r)) for r in rows[:_MAX_ROWS_LISTED])
    more = f" and {rows.size - _MAX_ROWS_LISTED} more" if rows.size > _MAX_ROWS_LISTED else ""
    return listed + more


@dataclass(frozen=True)
class CsvDialect:
    """How a CSV file is written: its field separator and decimal mark.

    Attributes
    ----------
    separator : str
        ``,`` (the default), ``;``, a tab or ``|``.
    decimal : str
        ``.`` or, in a file not separated by commas, ``,``.
    """

    separator: str = ","
    decimal: str = "."

    @property
    def is_default(self) -> bool:
        return self.separator == "," and self.decimal == "."

    def describe(self) -> str:
        """The dialect in words, for a warning."""
        words = f"fields separated by {OTHER_SEPARATORS.get(self.separator, repr(self.separator))}"
        return words + (" and a decimal comma" if self.decimal == "," else "")


def _sample(path: Path, *, gzipped: bool) -> str:
    opener = gzip.open if gzipped else open
    with opener(path, "rt", encoding="utf-8", errors="replace") as handle:
        return str(handle.read(_SAMPLE_CHARACTERS))


def sniff_dialect(path: Path, *, gzipped: bool = False) -> CsvDialect:
    """The separator and decimal mark of a CSV file whose header holds no comma.

    Parameters
    ----------
    path : Path
        A CSV file (gzipped when ``gzipped``).
    gzipped : bool
        Whether the file is gzip-compressed.

    Returns
    -------
    CsvDialect
        The default (comma, decimal point) unless the header has no comma and
        ``csv.Sniffer`` finds one of ``OTHER_SEPARATORS`` in the file's start.
    """
    try:
        sample = _sample(path, gzipped=gzipped)
    except (OSError, EOFError):
        return CsvDialect()
    header = sample.split("\n", 1)[0]
    if "," in header or not any(sep in header for sep in OTHER_SEPARATORS):
        return CsvDialect()
    try:
        separator = csv.Sniffer().sniff(sample, delimiters="".join(OTHER_SEPARATORS)).delimiter
    except csv.Error:
        return CsvDialect()
    if separator not in header:
        return CsvDialect()
    rows = sample.splitlines()[1:50]
    decimal = "," if any(_DECIMAL_COMMA.search(row) for row in rows) else "."
    return CsvDialect(separator=separator, decimal=decimal)


def read_table(path: str | Path) -> pd.DataFrame:
    """A CSV (``.csv``, ``.txt``, optionally gzipped) or Parquet (``.parquet``, ``.pq``) file."""
    path = Path(path)
    if not path.is_file():
        raise DataFileError(f"{path}: no such file")
    suffixes = [s.lower() for s in path.suffixes]
    try:
        if suffixes and suffixes[-1] in (".parquet", ".pq"):
            frame = pd.read_parquet(path)
        elif suffixes and (suffixes[-1] in (".csv", ".txt") or suffixes[-2:] == [".csv", ".gz"]):
            dialect = sniff_dialect(path, gzipped=suffixes[-1] == ".gz")
            frame = pd.read_csv(path, sep=dialect.separator, decimal=dialect.decimal)
            if not dialect.is_default:
                logger.warning("%s: read as a file with %s (its header has no comma); "
                               "columns: %s", path, dialect.describe(),
                               ", ".join(map(str, frame.columns)))
        else:
            raise DataFileError(
                f"{path}: unrecognised file type {''.join(suffixes) or '(no extension)'}; "
                "expected .csv, .csv.gz, .txt or .parquet"
            )
    except DataFileError:
        raise
    except pd.errors.EmptyDataError:
        raise DataFileError(f"{path}: the file is empty") from None
    except (pd.errors.ParserError, UnicodeDecodeError, OSError, ValueError) as exc:
        raise DataFileError(f"{path}: not a readable CSV/Parquet file ({exc})") from None
    if frame.shape[0] == 0:
        raise DataFileError(f"{path}: the file has a header but no data rows")
    return frame


def _numeric_column(frame: pd.DataFrame, name: str, path: Path) -> np.ndarray:
    if name not in frame.columns:
        present = ", ".join(map(str, frame.columns))
        hint = next((f"; the header seems to use {word} between fields: save the file with "
                     "commas between fields and a decimal point"
                     for sep, word in OTHER_SEPARATORS.items() if sep in present), "")
        raise DataFileError(f"{path}: no column {name!r}; columns present: {present}{hint}")
    column = frame[name]
    converted = pd.to_numeric(column, errors="coerce")
    bad = converted.isna() & column.notna()
    if bad.any():
        rows = np.flatnonzero(bad.to_numpy()) + 1
        example = column[bad].iloc[0]
        raise DataFileError(
            f"{path}: column {name!r} is not numeric: {example!r} in row(s) {_rows_text(rows)}"
        )
    return converted.to_numpy(dtype=float)


def load_observations(path: str | Path, *, coords: list[str] | tuple[str, ...], value: str,
                      drop_missing: bool = False) -> Observations:
    """Read ``coords`` and ``value`` columns; NaN or infinite entries are an error
    naming their rows unless ``drop_missing``, which drops those rows."""
    path = Path(path)
    if not coords:
        raise DataFileError("--coords: give at least one coordinate column, e.g. --coords x,y")
    if len(coords) > 3:
        raise DataFileError(f"--coords: at most 3 coordinate columns, got {len(coords)}")
    frame = read_table(path)
    columns = [_numeric_column(frame, c, path) for c in coords]
    points = np.column_stack(columns)
    values = _numeric_column(frame, value, path)
    rows = np.arange(1, values.size + 1)
    finite = np.isfinite(points).all(axis=1) & np.isfinite(values)
    if not finite.all():
        bad_rows = rows[~finite]
        if not drop_missing:
            raise DataFileError(
                f"{path}: {bad_rows.size} row(s) with missing (NaN) or infinite coordinates "
                f"or values: row(s) {_rows_text(bad_rows)}; fix them or pass --drop-missing"
            )
        points, values, rows = points[finite], values[finite], rows[finite]
    return Observations(points=points, values=values, coords=tuple(coords), value=value,
                        source=str(path), rows=rows)


def observations_from_arrays(points: np.ndarray, values: np.ndarray, *,
                             source: str = "<arrays>") -> Observations:
    """Validate in-memory coordinates and values the same way as a file."""
    points = np.asarray(points, dtype=float)
    points = points[:, None] if points.ndim == 1 else points
    values = np.asarray(values, dtype=float).ravel()
    if points.shape[0] != values.size:
        raise DataFileError(
            f"{source}: coordinates have {points.shape[0]} rows but values have {values.size}"
        )
    bad = ~(np.isfinite(points).all(axis=1) & np.isfinite(values))
    if bad.any():
        raise DataFileError(
            f"{source}: NaN or infinite entries in row(s) {_rows_text(np.flatnonzero(bad) + 1)}"
        )
    coords = tuple(f"x{k + 1}" for k in range(points.shape[1]))
    return Observations(points=points, values=values, coords=coords, value="y", source=source,
                        rows=np.arange(1, values.size + 1))
