#!/usr/bin/env python3
"""Times `dovetail match` against scipy on the same instances, read from the same file.

1. Dense 2,000 x 2,000 uniform weights: scipy.optimize.linear_sum_assignment (maximize=True)
   versus `dovetail match` (all weights positive on a complete graph, so both optima are
   perfect matchings and must have the same total).
2. Sparse 20,000 x 20,000, degree 8, records may stay unlinked: scipy.sparse.csgraph.
   min_weight_full_bipartite_matching on the dummy reduction versus `dovetail match`.

Each side is timed end to end (reading the CSV and solving) and for the solve alone.
Usage: python3 benches/scipy_compare.py [path/to/dovetail]   (needs numpy and scipy)
"""
import csv
import os
import subprocess
import sys
import tempfile
import time

import numpy as np
from scipy.optimize import linear_sum_assignment
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import min_weight_full_bipartite_matching

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
BIN = sys.argv[1] if len(sys.argv) > 1 else os.path.join(ROOT, "target", "release", "dovetail")


def write_pairs(path, rows, cols, w):
    with open(path, "w") as f:
        f.write("left_id,right_id,weight\n")
        for i, j, x in zip(rows, cols, w):
            f.write(f"L{i},R{j},{float(x)!r}\n")


def read_pairs(path):
    rows, cols, w = [], [], []
    with open(path) as f:
        r = csv.reader(f)
        next(r)
        for a, b, x in r:
            rows.append(int(a[1:]))
            cols.append(int(b[1:]))
            w.append(float(x))
    return np.array(rows), np.array(cols), np.array(w)


def run_ours(path, out):
    t = time.perf_counter()
    p = subprocess.run([BIN, "match", "--pairs", path, "--out", out], capture_output=True, text=True, check=True)
    wall = time.perf_counter() - t
    total = float(p.stdout.split("total weight:")[1].split()[0])
    solve = float(p.stderr.split("matching")[1].split("s")[0])
    return wall, solve, total


def dense(tmp):
    n = 2000
    rng = np.random.default_rng(1)
    w = rng.random((n, n))
    rows, cols = np.nonzero(np.ones((n, n), dtype=bool))
    path = os.path.join(tmp, "dense.csv")
    write_pairs(path, rows, cols, w[rows, cols])
    t = time.perf_counter()
    r, c, x = read_pairs(path)
    m = np.zeros((n, n))
    m[r, c] = x
    t_read = time.perf_counter() - t
    t = time.perf_counter()
    ri, ci = linear_sum_assignment(m, maximize=True)
    t_solve = time.perf_counter() - t
    ours_wall, ours_solve, ours_total = run_ours(path, os.path.join(tmp, "o1"))
    print(f"dense 2000x2000: scipy linear_sum_assignment solve {t_solve:.2f} s (read+solve {t_read + t_solve:.2f} s), "
          f"total {m[ri, ci].sum():.6f}; dovetail solve {ours_solve:.2f} s (read+solve {ours_wall:.2f} s), total {ours_total:.6f}")


def sparse(tmp):
    n, deg = 20000, 8
    rng = np.random.default_rng(2)
    rows = np.repeat(np.arange(n), deg)
    cols = rng.integers(0, n, n * deg)
    keys = np.unique(rows * n + cols)
    rows, cols = keys // n, keys % n
    w = rng.random(len(rows))
    path = os.path.join(tmp, "sparse.csv")
    write_pairs(path, rows, cols, w)
    t = time.perf_counter()
    r, c, x = read_pairs(path)
    t_read = time.perf_counter() - t
    t = time.perf_counter()
    # Dummy reduction: rows = left + right dummies, cols = right + left dummies; every perfect
    # matching has n + n edges, cost K - w on real pairs and K elsewhere, so min cost <=> max weight.
    k = x.max() + 1.0
    e = len(r)
    rr = np.concatenate([r, np.arange(n), n + np.arange(n), n + c])
    cc = np.concatenate([c, n + np.arange(n), np.arange(n), n + r])
    vv = np.concatenate([k - x, np.full(n, k), np.full(n, k), np.full(e, k)])
    g = coo_matrix((vv, (rr, cc)), shape=(2 * n, 2 * n)).tocsr()
    ri, ci = min_weight_full_bipartite_matching(g)
    t_solve = time.perf_counter() - t
    cost = float(np.asarray(g[ri, ci]).sum())
    scipy_total = 2 * n * k - cost
    ours_wall, ours_solve, ours_total = run_ours(path, os.path.join(tmp, "o2"))
    print(f"sparse 20000x20000 deg 8: scipy min_weight_full_bipartite_matching solve {t_solve:.2f} s "
          f"(read+solve {t_read + t_solve:.2f} s), total {scipy_total:.6f}; dovetail solve {ours_solve:.3f} s "
          f"(read+solve {ours_wall:.2f} s), total {ours_total:.6f}; speed-up end to end {(t_read + t_solve) / ours_wall:.1f}x")


if __name__ == "__main__":
    with tempfile.TemporaryDirectory() as tmp:
        sparse(tmp)
        dense(tmp)
