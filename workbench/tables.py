"""Reading tables and validating columns at the boundary.

Messages say what was expected, what was found and where, e.g.
``column 'successes' row 7 (line 8): 212 > attempts 200``. Rows are numbered
from 1 in the order of the input table (the header is not a row); the line is
where a CSV file holds the row (the header on line 1, one line per row).
Every data message names a row through :func:`row`.
"""

from __future__ import annotations

import hashlib
import re
from difflib import get_close_matches
from pathlib import Path
from typing import Iterable

import numpy as np
import pandas as pd

from workbench.errors import DataError

# A table larger than this is refused unless the recipe can aggregate it:
# beyond it the model (one likelihood term per row) grows too big to sample
# interactively on a laptop. Common practice, not a published figure.
MAX_MODEL_ROWS = 5_000
# Counts are read as float64, which holds whole numbers exactly only up to 2^53.
MAX_COUNT = 2**53
# Any measured number (distance, age, period) beyond ±2^53 is refused: float64
# no longer holds every whole number there, and a model's squares, products and
# exponentials of such values lose their digits or overflow (1e300 squared is inf).
MAX_MAGNITUDE = 2**53


def row(index: int) -> str:
    """How a message names the data row at 0-based position ``index``."""
    return f"row {index + 1} (line {index + 2})"


def rows(indices: Iterable[int], shown: int = 5) -> str:
    """Several data rows (0-based positions), the first ``shown`` of them."""
    indices = [int(i) for i in indices]
    text = ", ".join(row(i) for i in indices[:shown])
    return text + (" ..." if len(indices) > shown else "")


def read_table(path: str | Path) -> pd.DataFrame:
    """Read a CSV or Parquet file; raise :class:`DataError` if it cannot be read.

    A file that is not what its name says is described by its first bytes
    (a Parquet file named .csv, a spreadsheet, compressed or non-UTF-8 text),
    and a header naming one column twice is refused.
    """
    path = Path(path)
    if not path.is_file():
        raise DataError(f"data file {str(path)!r}: expected a readable CSV or Parquet file; found none")
    parquet = path.suffix.lower() in {".parquet", ".pq"}
    head = _head(path)
    expected = "expected a Parquet file" if parquet else "expected a UTF-8 CSV or a Parquet file"
    if parquet and not head.startswith(PARQUET_MAGIC) or not parquet and _looks_binary(path):
        raise DataError(f"data file {str(path)!r}: {expected}; it looks like {_looks_like(path, head)}")
    try:
        if parquet:
            table = pd.read_parquet(path)
        else:
            # pandas renames a repeated name ('successes.1'); the header as written says.
            header = pd.read_csv(path, header=None, nrows=1, skipinitialspace=True, dtype=str)
            _refuse_duplicate_header(path, list(header.iloc[0]))
            table = pd.read_csv(path, skipinitialspace=True)
    except DataError:
        raise
    except pd.errors.EmptyDataError:
        raise DataError(f"data file {str(path)!r}: {expected}; found an empty file (no header line)") from None
    except pd.errors.ParserError as err:
        fields = re.search(r"Expected (\d+) fields in line (\d+), saw (\d+)", str(err))
        found = (f"{fields.group(3)} fields on line {fields.group(2)} where the header has {fields.group(1)}"
                 if fields else "lines that do not split into the header's fields")
        raise DataError(f"data file {str(path)!r}: expected a CSV file with as many fields on every "
                        f"line as its header; found {found}") from None
    except Exception as err:  # pandas and pyarrow raise many kinds; all mean "unreadable"
        raise DataError(f"data file {str(path)!r}: {expected}; could not read it as a table "
                        f"({type(err).__name__})") from None
    if table.shape[0] == 0:
        raise DataError(f"data file {str(path)!r}: expected at least one data row; found none")
    table.columns = [str(c).strip() for c in table.columns]
    _refuse_duplicate_header(path, list(table.columns))
    return table


# A Parquet file starts (and ends) with these four bytes.
PARQUET_MAGIC = b"PAR1"
# File kinds recognised by their first bytes, for a message about a wrong file.
SIGNATURES = (
    (PARQUET_MAGIC, "a Parquet file (name it .parquet)"),
    (b"PK\x03\x04", "a ZIP archive, such as an Excel .xlsx workbook (save it as CSV)"),
    (b"\xd0\xcf\x11\xe0", "an old Excel .xls workbook (save it as CSV)"),
    (b"\x1f\x8b", "gzip-compressed data (decompress it first)"),
    (b"%PDF", "a PDF document"),
    (b"\xff\xfe", "UTF-16 text (save it as UTF-8)"),
    (b"\xfe\xff", "UTF-16 text (save it as UTF-8)"),
)


def _head(path: Path, size: int = 8) -> bytes:
    with open(path, "rb") as handle:
        return handle.read(size)


def _looks_binary(path: Path) -> bool:
    """True when the file is not UTF-8 text (a NUL byte or an invalid sequence)."""
    raw = path.read_bytes()
    if b"\x00" in raw:
        return True
    try:
        raw.decode("utf-8")
    except UnicodeDecodeError:
        return True
    return False


def _looks_like(path: Path, head: bytes) -> str:
    for magic, what in SIGNATURES:
        if head.startswith(magic):
            return what
    raw = path.read_bytes()
    try:
        raw.decode("utf-8")
    except UnicodeDecodeError as err:
        return (f"text in another encoding than UTF-8 (byte 0x{raw[err.start]:02x} at offset "
                f"{err.start}; save it as UTF-8)")
    return "UTF-8 text" if b"\x00" not in raw else "binary data"


def _refuse_duplicate_header(path: Path, names: list) -> None:
    seen = set()
    for name in (str(n).strip() for n in names):
        if name in seen:
            raise DataError(f"data file {str(path)!r}: expected each column name once in the header; "
                            f"found {name!r} twice")
        seen.add(name)


def file_sha256(path: str | Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def require_columns(table: pd.DataFrame, names: Iterable[str], recipe: str) -> None:
    """Every name must be a column (suggest the closest existing name), and
    the table must have a row: every recipe calls this first."""
    present = [str(c) for c in table.columns]
    for name in names:
        if name not in present:
            close = get_close_matches(name, present, n=1, cutoff=0.6)
            hint = f"; did you mean {close[0]!r}?" if close else f"; found columns {_short(present)}"
            raise DataError(f"recipe '{recipe}' needs column '{name}'{hint}")
    if len(table) == 0:
        raise DataError(f"recipe '{recipe}': expected at least one data row; found none")


def _short(names: list[str]) -> str:
    shown = ", ".join(repr(n[:40]) for n in names[:8])
    return shown + (", ..." if len(names) > 8 else "")


def numeric_column(table: pd.DataFrame, name: str) -> np.ndarray:
    """The column as float64 within ±:data:`MAX_MAGNITUDE`; non-numeric text,
    a missing value or a number too large for the models' arithmetic is an error."""
    values = _finite_column(table, name)
    huge = np.flatnonzero(np.abs(values) > MAX_MAGNITUDE)
    if huge.size:
        i = int(huge[0])
        raise DataError(f"column '{name}' {row(i)}: expected a number within ±2^53; found {values[i]:g}")
    return values


def _finite_column(table: pd.DataFrame, name: str) -> np.ndarray:
    raw = table[name]
    values = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float)
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        i = int(bad[0])
        found = raw.iloc[i]
        what = "an empty cell" if pd.isna(found) else repr(str(found)[:60])
        raise DataError(f"column '{name}' {row(i)}: expected a finite number; found {what}")
    return values


def count_column(table: pd.DataFrame, name: str, minimum: int = 0) -> np.ndarray:
    """The column as int64 counts >= ``minimum``."""
    values = _finite_column(table, name)
    frac = np.flatnonzero(values != np.round(values))
    if frac.size:
        i = int(frac[0])
        raise DataError(f"column '{name}' {row(i)}: expected a whole count; found {values[i]:g}")
    low = np.flatnonzero(values < minimum)
    if low.size:
        i = int(low[0])
        expected = "a count >= 0" if minimum == 0 else f"a count >= {minimum}"
        raise DataError(f"column '{name}' {row(i)}: expected {expected}; found {values[i]:g}")
    high = np.flatnonzero(values > MAX_COUNT)
    if high.size:
        i = int(high[0])
        raise DataError(f"column '{name}' {row(i)}: expected a count <= 2^53; found {values[i]:g}")
    return values.astype(np.int64)


def positive_column(table: pd.DataFrame, name: str) -> np.ndarray:
    values = numeric_column(table, name)
    bad = np.flatnonzero(values <= 0)
    if bad.size:
        i = int(bad[0])
        raise DataError(f"column '{name}' {row(i)}: expected a value > 0; found {values[i]:g}")
    return values


def label_column(table: pd.DataFrame, name: str) -> tuple[np.ndarray, list[str]]:
    """Integer codes and the label text (in order of first appearance)."""
    raw = table[name]
    missing = np.flatnonzero(raw.isna().to_numpy())
    if missing.size:
        raise DataError(f"column '{name}' {row(int(missing[0]))}: expected a label; found an empty cell")
    text = raw.astype(str).to_numpy()
    labels, codes = [], {}
    out = np.empty(len(text), dtype=np.int64)
    for i, value in enumerate(text):
        if value not in codes:
            codes[value] = len(labels)
            labels.append(value)
        out[i] = codes[value]
    return out, labels


def not_above(smaller: np.ndarray, larger: np.ndarray, small_name: str, large_name: str) -> None:
    """``smaller <= larger`` row by row."""
    bad = np.flatnonzero(smaller > larger)
    if bad.size:
        i = int(bad[0])
        raise DataError(
            f"column '{small_name}' {row(i)}: {smaller[i]:g} > {large_name} {larger[i]:g}"
        )


def check_size(rows: int, recipe: str, limit: int = MAX_MODEL_ROWS, what: str = "rows") -> None:
    """Refuse a table that would give a model of more than ``limit`` rows.

    ``what`` names what was counted, e.g. ``"distinct rows after summing rows
    with the same distance and group"`` for a recipe that sums.
    """
    if rows > limit:
        raise DataError(
            f"recipe '{recipe}': expected at most {limit} {what} (one model term each); found "
            f"{rows} (aggregate the table or fit a sample of it)"
        )
