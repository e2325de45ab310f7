#!/usr/bin/env python3
"""Check that pandas reads a replay's forecasts.parquet with the values of its forecasts.csv.

Usage: tools/check_parquet_pandas.py FOLDER [FOLDER ...]

FOLDER is a replay output folder (it holds forecasts.csv and forecasts.parquet, as written by a
binary built with `cargo build --release --features parquet`), or a `replay --batch` output folder,
whose days (`days/<day>/`) are each checked.

Both files are read with pandas: the Parquet file with the pyarrow engine, the CSV as text (no
missing-value guessing, so an empty cell stays empty). For every column, in the same order:
  * `*_time_utc` / `time_utc`: a UTC timestamp column, equal to the CSV's RFC 3339 times;
  * `horizon_s`, `fallback`: an unsigned integer column, equal to the CSV's whole numbers;
  * `block`: text, equal;
  * every other column: float64, equal to the CSV's number within 1e-12 relative, and null
    exactly where the CSV cell is empty (checked both as pandas' missing values and as real
    Parquet nulls, not NaN, with pyarrow).

Prints one line per folder (rows, columns, null cells) and exits 0 when everything matches, 1 on a
mismatch (the first mismatches are listed), 2 when a folder or file is missing or pyarrow is not
installed (`python3 -m pip install pyarrow`).
"""

import math
import sys
from pathlib import Path

import numpy as np
import pandas as pd

try:
    import pyarrow
    import pyarrow.parquet as pq
except ImportError:
    print("pyarrow is not installed: python3 -m pip install pyarrow", file=sys.stderr)
    sys.exit(2)

REL_TOL = 1e-12
UINT_COLUMNS = {"horizon_s", "fallback"}
TEXT_COLUMNS = {"block"}
MAX_REPORTED = 10


def is_time(name):
    return name.endswith("_time_utc") or name == "time_utc"


def close(a, b):
    """Equal within REL_TOL relative (exactly equal values, infinities included, always pass)."""
    if a == b:
        return True
    if not (math.isfinite(a) and math.isfinite(b)):
        return False
    return abs(a - b) <= REL_TOL * max(abs(a), abs(b))


def check_folder(folder):
    """Mismatch messages and a summary of one replay output folder."""
    csv_path, pq_path = folder / "forecasts.csv", folder / "forecasts.parquet"
    for p in (csv_path, pq_path):
        if not p.is_file():
            raise FileNotFoundError(f"{p}: missing (the parquet file needs a build with --features parquet)")
    text = pd.read_csv(csv_path, dtype=str, keep_default_na=False, na_filter=False)
    frame = pd.read_parquet(pq_path, engine="pyarrow")
    arrow = pq.read_table(pq_path)
    bad = []
    if list(text.columns) != list(frame.columns):
        bad.append(f"columns differ: CSV {list(text.columns)}, Parquet {list(frame.columns)}")
        return bad, None
    if len(text) != len(frame):
        bad.append(f"rows differ: CSV {len(text)}, Parquet {len(frame)}")
        return bad, None
    nulls = 0
    for col in text.columns:
        cells = text[col].to_numpy(dtype=object)
        values = frame[col]
        empty = np.array([c == "" for c in cells])
        missing = values.isna().to_numpy()
        arrow_nulls = arrow.column(col).null_count
        if arrow_nulls != int(empty.sum()):
            bad.append(f"{col}: {arrow_nulls} Parquet nulls, {int(empty.sum())} empty CSV cells")
        nulls += arrow_nulls
        for i in np.flatnonzero(empty != missing)[:MAX_REPORTED]:
            bad.append(f"line {i + 2}, {col}: CSV {cells[i]!r}, Parquet {values.iloc[i]} (null where the CSV is empty, and only there)")
        if is_time(col):
            if not isinstance(values.dtype, pd.DatetimeTZDtype) or str(values.dtype.tz) != "UTC":
                bad.append(f"{col}: dtype {values.dtype}, expected a UTC timestamp")
                continue
            expected = pd.to_datetime(pd.Series(cells).where(~empty), utc=True, format="ISO8601")
            same = (expected.dt.as_unit("us").to_numpy() == values.dt.as_unit("us").to_numpy()) | (empty & missing)
            for i in np.flatnonzero(~same)[:MAX_REPORTED]:
                bad.append(f"line {i + 2}, {col}: CSV {cells[i]}, Parquet {values.iloc[i]}")
        elif col in UINT_COLUMNS:
            if not pd.api.types.is_unsigned_integer_dtype(values.dtype):
                bad.append(f"{col}: dtype {values.dtype}, expected an unsigned integer")
                continue
            for i, (c, v) in enumerate(zip(cells, values.to_numpy())):
                if int(c) != int(v):
                    bad.append(f"line {i + 2}, {col}: CSV {c}, Parquet {v}")
                    break
        elif col in TEXT_COLUMNS:
            same = [c == v for c, v in zip(cells, values.to_numpy(dtype=object))]
            for i in [k for k, s in enumerate(same) if not s][:MAX_REPORTED]:
                bad.append(f"line {i + 2}, {col}: CSV {cells[i]!r}, Parquet {values.iloc[i]!r}")
        else:
            if values.dtype != np.float64:
                bad.append(f"{col}: dtype {values.dtype}, expected float64")
                continue
            floats = values.to_numpy()
            wrong = [i for i, c in enumerate(cells) if c != "" and not close(float(c), float(floats[i]))]
            for i in wrong[:MAX_REPORTED]:
                bad.append(f"line {i + 2}, {col}: CSV {cells[i]}, Parquet {float(floats[i])!r}")
    return bad, (len(frame), len(frame.columns), nulls)


def folders_of(arg):
    p = Path(arg)
    if (p / "forecasts.csv").is_file():
        return [p]
    days = p / "days"
    if days.is_dir():
        found = sorted(d for d in days.iterdir() if (d / "forecasts.csv").is_file())
        if found:
            return found
    raise FileNotFoundError(f"{p}: no forecasts.csv here, nor in days/*/ (give a replay or a replay --batch output folder)")


def main(argv):
    if len(argv) < 2 or argv[1] in ("-h", "--help"):
        print(__doc__.strip(), file=sys.stderr)
        return 2
    try:
        folders = [f for a in argv[1:] for f in folders_of(a)]
    except FileNotFoundError as e:
        print(e, file=sys.stderr)
        return 2
    failed, rows = 0, 0
    for f in folders:
        try:
            bad, summary = check_folder(f)
        except FileNotFoundError as e:
            print(e, file=sys.stderr)
            return 2
        if bad:
            failed += 1
            print(f"{f}: MISMATCH")
            for b in bad[:MAX_REPORTED]:
                print(f"  {b}")
            if len(bad) > MAX_REPORTED:
                print(f"  … and {len(bad) - MAX_REPORTED} more")
        else:
            n, cols, nulls = summary
            rows += n
            print(f"{f}: {n} rows x {cols} columns, {nulls} null cells (empty in the CSV): pass")
    print(f"pandas {pd.__version__}, pyarrow {pyarrow.__version__}: "
          f"{len(folders) - failed} of {len(folders)} folders match ({rows} rows)" + ("" if failed == 0 else f", {failed} MISMATCH"))
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
