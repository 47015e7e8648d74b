"""Parse time of a 20,000 x 50 numeric CSV: the cell-by-cell parser the tool used before,
the tool's vectorized reader (numpy's C reader), and pandas.read_csv (measured to decide
whether pandas would pay as a core dependency: its import counts, since a run imports it
once). Interleaved rounds in one process; prints each best time and the ratios.

The data are synthetic (seeded normal draws and a 3-class label), written to a temporary
file. Run: python bench/csv_read.py [--rows 20000] [--cols 50] [--rounds 5]
"""

from __future__ import annotations

import argparse
import csv
import io
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runner.datasets.columns import build_features  # noqa: E402
from runner.datasets.csv_reader import CsvFile, split_csv  # noqa: E402


def cell_by_cell(raw: bytes, target: str):
    """The parser before vectorizing (runner/datasets/sources.py's _csv, its checks kept):
    csv module rows, then float() and a finiteness check on every cell."""
    text = raw.decode("utf-8-sig")
    numbered = [(n, l) for n, l in enumerate(text.splitlines(), 1) if l.strip() and not l.lstrip().startswith("#")]
    rows = list(csv.reader(io.StringIO("\n".join(line for _, line in numbered))))
    header = [h.strip() for h in rows[0]]
    t = header.index(target)
    names = tuple(h for i, h in enumerate(header) if i != t)
    X = np.empty((len(rows) - 1, len(names)), dtype=np.float32)
    y_raw = []
    for r, row in enumerate(rows[1:]):
        if len(row) != len(header):
            raise ValueError("ragged row")
        y_raw.append(row[t].strip())
        c = 0
        for i, cell in enumerate(row):
            if i == t:
                continue
            if not cell.strip():
                raise ValueError("missing")
            X[r, c] = float(cell)
            if not np.isfinite(X[r, c]):
                raise ValueError("not finite")
            c += 1
    return X, y_raw


def vectorized(raw: bytes, target: str):
    f = CsvFile(raw, "bench.csv")
    table, y = split_csv(f, target)
    X, _ = build_features(table, "error", "error")
    return X, y


def pandas_read(raw: bytes, target: str):
    import pandas as pd

    frame = pd.read_csv(io.BytesIO(raw), comment=None)
    return frame.drop(columns=[target]).to_numpy(np.float64).astype(np.float32), frame[target].astype(str).tolist()


def pandas_import_seconds() -> float:
    """Seconds `import pandas` adds in a fresh interpreter that has numpy imported already."""
    code = "import time, numpy; t = time.perf_counter(); import pandas; print(time.perf_counter() - t)"
    best = float("inf")
    for _ in range(3):
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
        best = min(best, float(out.stdout))
    return best


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=20_000)
    parser.add_argument("--cols", type=int, default=50)
    parser.add_argument("--rounds", type=int, default=5)
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    X = rng.normal(size=(args.rows, args.cols)) * 10.0 ** rng.integers(-2, 3, size=args.cols)
    y = rng.integers(0, 3, size=args.rows)
    lines = [",".join([f"f{i}" for i in range(args.cols)] + ["label"])]
    lines += [",".join([repr(float(v)) for v in row] + [str(t)]) for row, t in zip(X, y)]
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench.csv"
        path.write_text("\n".join(lines) + "\n")
        raw = path.read_bytes()
    ways = {"cell by cell (before)": cell_by_cell, "vectorized (tool)": vectorized, "pandas.read_csv": pandas_read}
    reference = cell_by_cell(raw, "label")
    for name, fn in ways.items():
        got = fn(raw, "label")
        assert np.array_equal(got[0], reference[0]) and got[1] == reference[1], name
    best = dict.fromkeys(ways, float("inf"))
    for _ in range(args.rounds):
        for name, fn in ways.items():
            start = time.perf_counter()
            fn(raw, "label")
            best[name] = min(best[name], time.perf_counter() - start)
    print(f"{args.rows} x {args.cols} CSV ({len(raw) / 2**20:.1f} MiB), best of {args.rounds} interleaved rounds:")
    for name, seconds in best.items():
        print(f"  {name:24s} {seconds:7.3f} s   {best['cell by cell (before)'] / seconds:5.1f}x the old parser")
    imp = pandas_import_seconds()
    print(f"  import pandas            {imp:7.3f} s (fresh interpreter, numpy already imported)")
    print(
        f"  pandas incl. its import  {best['pandas.read_csv'] + imp:7.3f} s   vs vectorized "
        f"{best['vectorized (tool)']:.3f} s: ratio {(best['pandas.read_csv'] + imp) / best['vectorized (tool)']:.2f}"
    )
    print("All three give identical float32 values and labels.")


if __name__ == "__main__":
    main()
