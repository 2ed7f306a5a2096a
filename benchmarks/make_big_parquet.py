"""Write a large invented two-way dataset to Parquet in chunks (pyarrow; low memory).

Scenario: tensile strength of printed brackets by resin (4 kinds) and print
orientation (5 angles): unbalanced cells, spread growing with the cell mean.

    python benchmarks/make_big_parquet.py OUT.parquet --rows 100000000 [--chunk 5000000] [--seed 1]

Not committed: the file is generated where the benchmark runs.
"""

from __future__ import annotations

import argparse
import sys

import numpy as np

RESINS = ("acrylate", "epoxy", "nylon-fill", "urethane")
ANGLES = ("0deg", "15deg", "30deg", "45deg", "60deg")
#: cell weights (unbalanced) and means / SDs (heteroscedastic): invented
WEIGHTS = np.array([[4, 3, 2, 1, 1], [2, 2, 2, 2, 2], [1, 2, 3, 4, 5], [3, 1, 3, 1, 3]], float)
MEANS = np.array([[50, 52, 54, 55, 57], [48, 50, 53, 57, 61], [55, 55, 56, 56, 57], [45, 49, 52, 56, 58]], float)
SDS = np.array([[2, 3, 4, 5, 6], [3, 3, 3, 3, 3], [6, 5, 4, 3, 2], [2, 4, 2, 4, 2]], float)


def chunk_table(rng, n):
    import pyarrow as pa

    p = (WEIGHTS / WEIGHTS.sum()).ravel()
    cell = rng.choice(p.size, size=n, p=p)
    j, k = np.divmod(cell, 5)
    y = MEANS.ravel()[cell] + SDS.ravel()[cell] * rng.standard_normal(n)
    ra = pa.DictionaryArray.from_arrays(pa.array(j.astype(np.int32)), pa.array(RESINS))
    rb = pa.DictionaryArray.from_arrays(pa.array(k.astype(np.int32)), pa.array(ANGLES))
    return pa.table({"resin": ra, "angle": rb, "strength": y})


def write(path, rows, *, chunk=5_000_000, seed=1):
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    writer = None
    done = 0
    try:
        while done < rows:
            t = chunk_table(rng, min(chunk, rows - done))
            if writer is None:
                writer = pq.ParquetWriter(path, t.schema, compression="snappy")
            writer.write_table(t, row_group_size=1_000_000)
            done += t.num_rows
    finally:
        if writer is not None:
            writer.close()
    return path


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out")
    ap.add_argument("--rows", type=int, default=100_000_000)
    ap.add_argument("--chunk", type=int, default=5_000_000)
    ap.add_argument("--seed", type=int, default=1)
    a = ap.parse_args(argv)
    write(a.out, a.rows, chunk=a.chunk, seed=a.seed)
    print(f"wrote {a.rows:,} rows to {a.out}", file=sys.stderr)


if __name__ == "__main__":
    main()
