#!/usr/bin/env python3
"""Reference optima for the one-to-one matcher, computed with scipy.

Writes matching_fixtures.json: random sparse bipartite instances of mixed shapes, densities
and weight laws (ties and negative weights included) with the maximum total weight of a
one-to-one matching in which every record may stay unlinked. The optimum comes from
scipy.optimize.linear_sum_assignment on the dense reduction with dummy partners:

    [ -W (pairs with w > 0; others forbidden) | diag 0 (left stays unlinked)  ]
    [ diag 0 (right stays unlinked)           | 0 (dummy meets dummy)         ]

Run: python3 tests/reference/matching_fixtures.py   (needs numpy and scipy; the Rust tests read
only the committed JSON).
"""
import json
import os

import numpy as np
from scipy.optimize import linear_sum_assignment

FORBID = 1e12


def instance(rng, nl, nr, density, law):
    mask = rng.random((nl, nr)) < density
    if law == "uniform":
        w = rng.random((nl, nr))
    elif law == "exponential":
        w = rng.exponential(1.0, (nl, nr))
    elif law == "integer-ties":
        w = rng.integers(-2, 5, (nl, nr)).astype(float)
    elif law == "normal":
        w = rng.normal(0.5, 2.0, (nl, nr))
    else:  # "linkage": mostly negative, a few strongly positive
        w = np.where(rng.random((nl, nr)) < 0.2, rng.normal(8, 4, (nl, nr)), rng.normal(-6, 2, (nl, nr)))
    pairs = [[int(i), int(j), float(w[i, j])] for i, j in zip(*np.nonzero(mask))]
    return pairs


def optimum(nl, nr, pairs):
    n = nl + nr
    c = np.full((n, n), FORBID)
    for i, j, w in pairs:
        if w > 0:
            c[i, j] = -w
    for i in range(nl):
        c[i, nr + i] = 0.0
    for j in range(nr):
        c[nl + j, j] = 0.0
    c[nl:, nr:] = 0.0
    rows, cols = linear_sum_assignment(c)
    total = c[rows, cols].sum()
    assert total < FORBID / 2
    return -float(total)


def main():
    rng = np.random.default_rng(20261201)
    cases = []
    laws = ["uniform", "exponential", "integer-ties", "normal", "linkage"]
    shapes = [(1, 1), (3, 7), (7, 3), (10, 10), (25, 40), (40, 25), (60, 60), (90, 70)]
    densities = [0.05, 0.2, 0.6, 1.0]
    k = 0
    grid = [(shape, density) for shape in shapes for density in densities]
    for shape, density in grid + grid:  # every cell twice, with fresh draws
        law = laws[k % len(laws)]
        k += 1
        nl, nr = shape
        pairs = instance(rng, nl, nr, density, law)
        cases.append({
            "n_left": nl,
            "n_right": nr,
            "density": density,
            "law": law,
            "pairs": pairs,
            "optimum": optimum(nl, nr, pairs),
        })
    out = os.path.join(os.path.dirname(os.path.abspath(__file__)), "matching_fixtures.json")
    with open(out, "w") as f:
        json.dump({"source": "scipy.optimize.linear_sum_assignment, dense reduction with dummy partners",
                   "scipy": __import__("scipy").__version__, "cases": cases}, f)
    print(f"wrote {len(cases)} cases to {out}")


if __name__ == "__main__":
    main()
