#!/usr/bin/env python3
"""Reference Wilson score intervals for `dovetail score`'s calibration table, by scipy.

The share of true links in each confidence band is given with the Wilson score interval
(Wilson 1927), the interval scipy.stats.binomtest(...).proportion_ci(method="wilson")
computes. Writes score_fixtures.json with (true, links, low, high) rows; the Rust unit test
in src/score.rs compares to 1e-9.

Run: python3 tests/reference/score_fixtures.py   (needs scipy)
"""
import json
import os

from scipy.stats import binomtest

CASES = [(8, 10), (0, 5), (5, 5), (1, 1), (97, 100), (450, 512), (3, 1000), (999, 1000)]

rows = []
for k, n in CASES:
    ci = binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    rows.append({"true": k, "links": n, "low": ci.low, "high": ci.high})

out = os.path.join(os.path.dirname(os.path.abspath(__file__)), "score_fixtures.json")
with open(out, "w") as f:
    json.dump({"wilson_95": rows}, f, indent=1)
    f.write("\n")
print(f"wrote {out}")
