"""Reading tables and validating columns at the boundary.

Messages say what was expected, what was found and where, e.g.
``column 'successes' row 7 (line 8): 212 > attempts 200``. Rows are numbered
from 1 in the order of the input table (the header is not a row); the line is
where a CSV file holds the row (the header on line 1, one line per row).
Every data message names a row through :func:`row`.
"""

from __future__ import annotations

import hashlib
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


def row(index: int) -> str:
    """How a message names the data row at 0-based position ``index``."""
    return f"row {index + 1} (line {index + 2})"


def rows(indices: Iterable[int], shown: int = 5) -> str:
    """Several data rows (0-based positions), the first ``shown`` of them."""
    indices = [int(i) for i in indices]
    text = ", ".join(row(i) for i in indices[:shown])
    return text + (" ..." if len(indices) > shown else "")


def read_table(path: str | Path) -> pd.DataFrame:
    """Read a CSV or Parquet file; raise :class:`DataError` if it cannot be read."""
    path = Path(path)
    if not path.is_file():
        raise DataError(f"data file {str(path)!r}: expected a readable CSV or Parquet file; found none")
    try:
        if path.suffix.lower() in {".parquet", ".pq"}:
            table = pd.read_parquet(path)
        else:
            table = pd.read_csv(path, skipinitialspace=True)
    except Exception as err:  # pandas raises many kinds; all mean "unreadable"
        first = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
        raise DataError(f"data file {str(path)!r}: could not read it as a table ({first})") from None
    if table.shape[0] == 0:
        raise DataError(f"data file {str(path)!r}: expected at least one data row; found none")
    table.columns = [str(c).strip() for c in table.columns]
    return table


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
    """The column as float64; non-numeric text or a missing value is an error."""
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
    values = numeric_column(table, name)
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
