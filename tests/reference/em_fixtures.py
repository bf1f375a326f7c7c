#!/usr/bin/env python3
"""Reference maximum-likelihood fits of the two-class Fellegi-Sunter mixture, by scipy.

Simulates agreement-pattern counts from known laws (with missing values, which carry no
evidence: a missing field is left out of both classes' likelihood), then maximises the
log-likelihood directly with scipy.optimize.minimize (BFGS over logit / softmax parameters),
and writes em_fixtures.json with the counts and the fitted p, m and u. EM's fixed point must
equal this direct fit; the Rust test compares them to 1e-4.

Run: python3 tests/reference/em_fixtures.py   (needs numpy and scipy)
"""
import json
import os

import numpy as np
from scipy.optimize import minimize
from scipy.special import log_softmax, expit


def simulate(rng, p, m, u, miss, n):
    counts = {}
    for _ in range(n):
        laws = m if rng.random() < p else u
        pat = tuple(-1 if rng.random() < miss else int(rng.choice(len(l), p=l)) for l in laws)
        counts[pat] = counts.get(pat, 0) + 1
    pats = sorted(counts)
    return pats, [counts[q] for q in pats]


def direct_fit(levels, pats, counts, start):
    pats = np.array(pats)
    counts = np.array(counts, dtype=float)
    sizes = list(levels)

    def unpack(x):
        p = expit(x[0])
        off = 1
        lm, lu = [], []
        for L in sizes:
            lm.append(log_softmax(np.concatenate([[0.0], x[off:off + L - 1]])))
            off += L - 1
        for L in sizes:
            lu.append(log_softmax(np.concatenate([[0.0], x[off:off + L - 1]])))
            off += L - 1
        return p, lm, lu

    def nll(x):
        p, lm, lu = unpack(x)
        a = np.full(len(pats), np.log(p))
        b = np.full(len(pats), np.log1p(-p))
        for k in range(len(sizes)):
            obs = pats[:, k] >= 0
            a[obs] += lm[k][pats[obs, k]]
            b[obs] += lu[k][pats[obs, k]]
        return -np.sum(counts * np.logaddexp(a, b))

    p0, m0, u0 = start
    x0 = [np.log(p0 / (1 - p0))]
    for law in (m0, u0):
        for l in law:
            x0.extend(np.log(np.array(l[1:]) / l[0]))
    res = minimize(nll, np.array(x0), method="BFGS", options={"gtol": 1e-9, "maxiter": 10000})
    p, lm, lu = unpack(res.x)
    return float(p), [list(np.exp(v)) for v in lm], [list(np.exp(v)) for v in lu], float(-res.fun)


def main():
    rng = np.random.default_rng(1969)
    cases = []
    specs = [
        (0.1, [[0.85, 0.1, 0.05], [0.9, 0.1], [0.7, 0.2, 0.1], [0.95, 0.05]],
              [[0.05, 0.15, 0.8], [0.3, 0.7], [0.02, 0.08, 0.9], [0.1, 0.9]], 0.1, 30000),
        (0.35, [[0.8, 0.2], [0.75, 0.15, 0.1], [0.9, 0.1]],
               [[0.2, 0.8], [0.1, 0.2, 0.7], [0.3, 0.7]], 0.0, 20000),
        (0.02, [[0.9, 0.05, 0.05], [0.8, 0.2], [0.85, 0.1, 0.05], [0.7, 0.3], [0.9, 0.1]],
               [[0.01, 0.04, 0.95], [0.2, 0.8], [0.05, 0.1, 0.85], [0.4, 0.6], [0.25, 0.75]], 0.2, 60000),
    ]
    for p, m, u, miss, n in specs:
        pats, counts = simulate(rng, p, m, u, miss, n)
        levels = [len(l) for l in m]
        fp, fm, fu, ll = direct_fit(levels, pats, counts, (p, m, u))
        cases.append({"levels": levels, "patterns": [list(q) for q in pats], "counts": counts,
                      "p": fp, "m": fm, "u": fu, "loglik": ll})
    out = os.path.join(os.path.dirname(os.path.abspath(__file__)), "em_fixtures.json")
    with open(out, "w") as f:
        json.dump({"source": "scipy.optimize.minimize (BFGS) on the mixture log-likelihood", "cases": cases}, f)
    print(f"wrote {len(cases)} cases to {out}")


if __name__ == "__main__":
    main()
