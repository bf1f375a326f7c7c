#!/usr/bin/env python3
"""Reference values for the pieces of the value-frequency weighting, by scipy.

1. Weighted isotonic (non-decreasing) regression, scipy.optimize.isotonic_regression: the
   shares of relatives are made non-decreasing in the other fields' weight this way.
2. The maximum-likelihood mixing share k of a two-component mixture with known component
   densities, scipy.optimize.minimize_scalar (bounded) on the negative weighted
   log-likelihood  -sum_i w_i ln(k r_i + 1 - k),  r_i the ratio of the two densities at
   observation i. The Rust side finds it by EM.

Writes frequency_fixtures.json beside this file. Run: python3 tests/reference/frequency_fixtures.py
(needs numpy and scipy).
"""
import json
import os

import numpy as np
from scipy.optimize import isotonic_regression, minimize_scalar


def main():
    rng = np.random.default_rng(1989)
    isotonic = []
    for n in [1, 2, 5, 9, 20, 40]:
        for _ in range(3):
            y = rng.random(n)
            w = rng.random(n) * 10 + 0.1
            x = isotonic_regression(y, weights=w, increasing=True).x
            isotonic.append({"y": y.tolist(), "w": w.tolist(), "fit": x.tolist()})
    mixing = []
    for mu in [-0.6, 0.0, 0.3, 1.0]:
        for n in [30, 200]:
            # Ratios m(v)/u(v), log-normal: rare values have large ratios.
            ratio = np.exp(rng.normal(mu, 1.5, n))
            w = rng.random(n)
            obj = lambda k: -np.sum(w * np.log(k * ratio + 1.0 - k))
            res = minimize_scalar(obj, bounds=(0.0, 1.0), method="bounded",
                                  options={"xatol": 1e-12})
            mixing.append({"ratio": ratio.tolist(), "w": w.tolist(), "share": float(res.x)})
    out = {"source": "scipy " + __import__("scipy").__version__,
           "isotonic": isotonic, "mixing": mixing}
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "frequency_fixtures.json")
    with open(path, "w") as f:
        json.dump(out, f, indent=1)


if __name__ == "__main__":
    main()
