#!/usr/bin/env python3
"""A careful, vectorised Python peer of `dovetail link`, for honest speed comparisons.

Usage: python3 benches/peer.py DIR OUT
       python3 benches/peer.py --score LINKS TRUTH
  DIR: a folder written by `dovetail synth` (config.toml, the two tables, truth.csv)
  OUT: output folder; gets links.csv (left_id, right_id, weight, posterior)

The same job as `dovetail link` on the same config, done the way a careful analyst would do it
with general libraries only (pandas with the pyarrow CSV engine, numpy, scipy, rapidfuzz):

1. read: both tables with pandas (pyarrow engine, strings only), only the id and field columns.
2. clean: per field, over the distinct values of both tables at once (pd.factorize, then one
   cached function call per distinct value, then a take): the cleaning dovetail uses by default
   -- names: accents folded (NFKD, combining marks dropped), lower case, apostrophes and dots
   dropped, other punctuation to spaces, spaces collapsed; `code`: folded, alphanumerics only,
   upper case; `digits`: ASCII digits only; dates: trimmed and parsed (YYYY-MM-DD, YYYYMMDD,
   YYYY-MM, YYYY). An empty result is "missing". Each field ends as one integer code per record
   in a dictionary shared by both tables (-1 = missing).
3. block: per pass, each key part's transform (soundex, nysiis, first:N, last:N, year,
   year-month, digits, exact) over the distinct cleaned values (same rules as dovetail's
   src/text.rs), the parts combined into one int64 key, left and right inner-joined on it
   (pd.merge); blocks over 2,000,000 pairs skipped as dovetail does; passes unioned and
   duplicate pairs dropped (sort of l * n_right + r; numpy 2's hash-based np.unique is
   far slower on millions of keys, so the peer sorts or uses pd.factorize instead).
4. compare: one level per field per pair. Equal codes: level 0. Jaro-Winkler: rapidfuzz over
   the distinct (left value, right value) pairs only (rapidfuzz.process.cpdist, all cores),
   banded by the config's bands (0 identical, 1 >= first band, ..., last = other). Dates, the
   same five levels as dovetail (vectorised on year/month/day arrays): 0 same, 1 day and month
   swapped, 2 one digit of YYYYMMDD off, 3 same year (also when one side is known only to the
   year or month), 4 different. Exact: 0 equal, 1 not. Missing on either side: its own level,
   which contributes nothing to the likelihoods.
5. fit: the level matrix is encoded as one mixed-radix int64 per pair and collapsed to distinct
   patterns with counts (pd.factorize + np.bincount); Fellegi-Sunter two-class EM under conditional independence
   on the counts (numpy), to a largest parameter change below 1e-6 or 500 iterations.
   weight = sum over observed fields of ln(m/u); theta = weight + ln(p/(1-p)); posterior =
   1/(1+exp(-theta)).
6. match: one-to-one. Pairs with theta > 0 (posterior > 0.5) only; connected components of
   that bipartite graph (scipy.sparse.csgraph.connected_components); components with one pair
   or a single record on one side (stars) solved in bulk with numpy (best pair); the others
   one by one with scipy.optimize.linear_sum_assignment (maximize) on the dense theta matrix
   with 0 for absent pairs (an assignment to a 0 cell = stay unlinked), or, for a component
   whose dense matrix would exceed 4M cells, scipy.sparse.csgraph.min_weight_full_bipartite_matching
   on the usual dummy reduction.
7. write: links.csv with pyarrow's CSV writer.

What it does not do (dovetail does): the one-to-one refinement of the fit, per-pass strata,
feasibility assessment, belief-propagation confidences, duplicate checks, completeness
estimates, review/unlinked files and the HTML report.

Per-stage seconds go to stderr, then precision and recall against DIR/truth.csv when present
(skipped with PEER_SCORE=0, as benches/peer.sh does for its timed runs; the score is not part of
the pipeline). `python3 benches/peer.py --score LINKS TRUTH` scores any links file (first two
columns: left id, right id), dovetail's too.
"""
import os
import sys
import time
import tomllib
import unicodedata

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
from rapidfuzz.distance import JaroWinkler
from scipy.optimize import linear_sum_assignment
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components, min_weight_full_bipartite_matching

try:  # Soundex only: its NYSIIS is another variant of the rules, so the peer has its own
    import jellyfish
except ImportError:
    jellyfish = None
try:
    from rapidfuzz.process import cpdist
except ImportError:  # rapidfuzz < 3.6
    cpdist = None

MAX_BLOCK_PAIRS = 2_000_000
EM_TOL = 1e-6
EM_MAX_IT = 500
DENSE_CELLS = 4_000_000
FLOOR = 1e-12


# ---------------------------------------------------------------------------------------------
# Cleaning (one call per distinct value)

def fold(s):
    if s.isascii():
        return s
    return "".join(c for c in unicodedata.normalize("NFKD", s)
                   if unicodedata.category(c) not in ("Mn", "Mc", "Me"))


def clean_digits(s):
    return "".join(c for c in s if "0" <= c <= "9")


def chunks(col):
    """The Arrow chunks of a pandas string column (zero-copy for Arrow-backed columns)."""
    a = pa.array(col)
    a = a.chunks if isinstance(a, pa.ChunkedArray) else [a]
    return [c.cast(pa.large_string()) for c in a]


def encode(arr):
    """Dictionary codes of a (chunked) string array: int64 codes (-1 for null), dictionary."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    d = pc.dictionary_encode(arr)
    codes = pc.fill_null(d.indices, -1).to_numpy(zero_copy_only=False).astype(np.int64)
    return codes, d.dictionary


def clean_vectorised(arr, how):
    """The cleaning of a pyarrow array of distinct raw strings, in pyarrow compute kernels
    (accents folded in Python, for the few non-ASCII values only)."""
    if how in ("name", "code", "text"):
        ascii_ = pc.string_is_ascii(arr).to_numpy(zero_copy_only=False)
        if not ascii_.all():
            vals = arr.to_numpy(zero_copy_only=False).copy()
            bad = np.flatnonzero(~ascii_)
            vals[bad] = [fold(v) for v in vals[bad]]
            arr = pa.array(vals, pa.string())
    if how == "name":
        arr = pc.utf8_lower(arr)
        arr = pc.replace_substring_regex(arr, "['\u2019.]", "")
        arr = pc.replace_substring_regex(arr, r"[^\p{L}\p{N}]+", " ")
        arr = pc.utf8_trim_whitespace(arr)
    elif how == "code":
        arr = pc.utf8_upper(pc.replace_substring_regex(arr, r"[^\p{L}\p{N}]+", ""))
    elif how == "digits":
        arr = pc.replace_substring_regex(arr, "[^0-9]+", "")
    elif how == "text":
        arr = pc.utf8_trim_whitespace(pc.replace_substring_regex(pc.utf8_lower(arr), r"\s+", " "))
    elif how == "none":
        arr = pc.utf8_trim_whitespace(arr)
    else:
        raise SystemExit(f"unknown normalize `{how}`")
    return arr


def parse_dates(values):
    """(n, 3) int64 year, month (0 unknown), day (0 unknown) and a mask of unreadable values.
    YYYY-MM-DD is parsed vectorised; other forms by parse_date, one call per value."""
    arr = pa.array(values, pa.string())
    iso = pc.match_substring_regex(arr, r"^\d{4}-\d{2}-\d{2}$").to_numpy(zero_copy_only=False)
    ymd = np.zeros((len(values), 3), dtype=np.int64)
    bad = np.zeros(len(values), dtype=bool)
    i = np.flatnonzero(iso)
    if len(i):
        sub = arr.take(pa.array(i))
        for k, (a, b) in enumerate(((0, 4), (5, 7), (8, 10))):
            ymd[i, k] = pc.cast(pc.utf8_slice_codeunits(sub, a, b), pa.int64()).to_numpy()
        y, m, d = ymd[i, 0], ymd[i, 1], ymd[i, 2]
        dim = np.select([np.isin(m, (4, 6, 9, 11)),
                         (m == 2) & (((y % 4 == 0) & (y % 100 != 0)) | (y % 400 == 0)),
                         m == 2], [30, 29, 28], 31)
        bad[i] = (y < 1000) | (m < 1) | (m > 12) | (d < 1) | (d > dim)
    for j in np.flatnonzero(~iso):
        p = parse_date(values[j])
        if p is None:
            bad[j] = True
        else:
            ymd[j] = p
    return ymd, bad


def days_in_month(y, m):
    if m in (4, 6, 9, 11):
        return 30
    if m == 2:
        return 29 if (y % 4 == 0 and y % 100 != 0) or y % 400 == 0 else 28
    return 31


def parse_date(s):
    """(year, month or 0, day or 0), or None; the forms dovetail reads in ymd order."""
    s = s.strip()
    parts = s.replace("/", "-").replace(".", "-").replace(" ", "-").split("-")
    num = lambda p: int(p) if p and len(p) <= 4 and p.isascii() and p.isdigit() else None
    if len(parts) == 1 and len(s) == 8 and s.isdigit():
        y, m, d = int(s[:4]), int(s[4:6]), int(s[6:8])
    elif len(parts) == 1 and len(s) == 4:
        y, m, d = num(s), 0, 0
    elif len(parts) == 2 and len(parts[0]) == 4:
        y, m, d = num(parts[0]), num(parts[1]), 0
    elif len(parts) == 3 and len(parts[0]) == 4:
        y, m, d = num(parts[0]), num(parts[1]), num(parts[2])
    else:
        return None
    if y is None or m is None or d is None or not 1000 <= y <= 9999:
        return None
    if m and not 1 <= m <= 12:
        return None
    if d and not (1 <= d <= 31 and d <= days_in_month(y, m or 1)):
        return None
    return y, m, d


# ---------------------------------------------------------------------------------------------
# Key transforms (same rules as dovetail's src/text.rs), one call per distinct value

SOUNDEX = {**dict.fromkeys("BFPV", "1"), **dict.fromkeys("CGJKQSXZ", "2"),
           **dict.fromkeys("DT", "3"), "L": "4", "M": "5", "N": "5", "R": "6"}


_NOT_LETTER = {i: None for i in range(128) if not chr(i).isalpha()}


def letters(s):
    """The ASCII letters of a value, upper case (accents folded first)."""
    if s.isascii():
        return s.translate(_NOT_LETTER).upper()
    return "".join(c.upper() for c in fold(s) if c.isascii() and c.isalpha())


def soundex(s):
    c = letters(s)
    if not c:
        return ""
    out = [c[0]]
    last = SOUNDEX.get(c[0])
    for x in c[1:]:
        if len(out) == 4:
            break
        if x in "HW":
            continue
        if x in "AEIOUY":
            last = None
            continue
        d = SOUNDEX.get(x)
        if d != last and d is not None:
            out.append(d)
        last = d
    return "".join(out).ljust(4, "0")


_NYS_PREFIX = (("MAC", "MCC"), ("KN", "NN"), ("K", "C"), ("PH", "FF"), ("PF", "FF"),
               ("SCH", "SSS"))
_NYS_SUFFIX = (("EE", "Y"), ("IE", "Y"), ("DT", "D"), ("RT", "D"), ("RD", "D"), ("NT", "D"),
               ("ND", "D"))
_VOWELS = frozenset("AEIOU")
_NYS_PLAIN = {"Q": "G", "Z": "S", "M": "N"}


def nysiis(s):
    """NYSIIS as dovetail's src/text.rs has it (no truncation)."""
    w = letters(s)
    if not w:
        return ""
    for a, b in _NYS_PREFIX:
        if w.startswith(a):
            w = b + w[len(a):]
            break
    for a, b in _NYS_SUFFIX:
        if w.endswith(a):
            w = w[:-len(a)] + b
            break
    c = list(w)
    n = len(c)
    vowels, plain = _VOWELS, _NYS_PLAIN
    key = [c[0]]
    for i in range(1, n):
        prev, cur = c[i - 1], c[i]
        nxt = c[i + 1] if i + 1 < n else " "
        if cur in vowels:
            if cur == "E" and nxt == "V":
                c[i] = "A"
                if i + 1 < n:
                    c[i + 1] = "F"
            else:
                c[i] = "A"
        elif cur in plain:
            c[i] = plain[cur]
        elif cur == "K":
            c[i] = "N" if nxt == "N" else "C"
        elif cur == "S" and nxt == "C" and i + 2 < n and c[i + 2] == "H":
            c[i + 1] = c[i + 2] = "S"
        elif cur == "P" and nxt == "H":
            c[i] = c[i + 1] = "F"
        elif cur == "H" and (prev not in vowels or nxt not in vowels):
            c[i] = prev
        elif cur == "W" and prev in vowels:
            c[i] = prev
        if c[i] != prev:
            key.append(c[i])
    if len(key) > 1 and key[-1] == "S":
        key.pop()
    if len(key) > 2 and key[-2] == "A" and key[-1] == "Y":
        del key[-2]
    if len(key) > 1 and key[-1] == "A":
        key.pop()
    return "".join(key)


def transform_fn(name, is_date):
    head, _, arg = name.partition(":")
    if head == "exact":
        return lambda s, d: s
    if head == "soundex":
        if jellyfish is not None:  # same codes as dovetail's on cleaned names, checked
            return lambda s, d: (jellyfish.soundex(s) if s.isascii() and s[:1].isalpha()
                                 else soundex(s))
        return lambda s, d: soundex(s)
    if head == "nysiis":
        return lambda s, d: nysiis(s)
    if head == "first":
        n = int(arg)
        return lambda s, d: s[:n]
    if head == "last":
        n = int(arg)
        return lambda s, d: s[-n:]
    if head == "year":
        return lambda s, d: f"{d[0]:04}" if d else ""
    if head == "year-month":
        return lambda s, d: f"{d[0]:04}-{d[1]:02}" if d and d[1] else ""
    if head == "digits":
        if arg:
            n = int(arg)
            return lambda s, d: clean_digits(s)[:n]
        return lambda s, d: clean_digits(s)
    if head == "initials":
        return lambda s, d: "".join(w[0] for w in s.split())
    if head == "sorted-tokens":
        return lambda s, d: " ".join(sorted(s.split()))
    raise SystemExit(f"unknown key transform `{name}`")


# ---------------------------------------------------------------------------------------------

class Field:
    """One compared field: a shared dictionary of cleaned values and per-record codes."""

    def __init__(self, spec, lcol, rcol):
        self.name = spec["name"]
        self.method = spec["method"]
        default = "none" if self.method in ("date", "number") else "name"
        self.normalize = spec.get("normalize", default)
        if self.method == "jaro-winkler":
            self.bands = list(spec.get("bands", [0.94, 0.88]))
        elif self.method == "levenshtein":
            self.bands = list(spec.get("bands", [0.8, 0.6]))
        else:
            self.bands = []
        nl = len(lcol)
        raw_codes, raw_dict = encode(pa.chunked_array(chunks(lcol) + chunks(rcol)))
        cleaned = clean_vectorised(raw_dict, self.normalize)
        codes, dict_ = encode(cleaned)
        dict_ = dict_.to_numpy(zero_copy_only=False)
        codes = np.append(codes, -1)[raw_codes]  # missing raw value (-1) stays -1
        empty = np.flatnonzero(dict_ == "")
        if len(empty):
            codes[codes == empty[0]] = -1
        self.dict = dict_
        self.left = codes[:nl]
        self.right = codes[nl:]
        self.dates = None
        self.digits = None
        if self.method == "date":
            ymd, bad = parse_dates(dict_)
            self.dates = ymd
            if bad.any():  # unreadable dates are treated as missing
                self.left = np.where(bad[np.maximum(self.left, 0)] & (self.left >= 0), -1, self.left)
                self.right = np.where(bad[np.maximum(self.right, 0)] & (self.right >= 0), -1,
                                      self.right)

    @property
    def n_levels(self):
        if self.method == "exact":
            return 2
        if self.method == "date":
            return 5
        return len(self.bands) + 2

    def key_codes(self, transform):
        """Per-record codes of a key part (-1 missing), computed over the distinct values:
        vectorised where the transform allows, else one Python call per distinct value."""
        head, _, arg = transform.partition(":")
        if head == "exact":
            return self.left, self.right, len(self.dict)
        if head in ("year", "year-month") and self.dates is not None:
            y, m = self.dates[:, 0], self.dates[:, 1]
            keyed = y * 100 + m if head == "year-month" else y.copy()
            keyed[(y == 0) | ((m == 0) if head == "year-month" else False)] = -1
            kc, uniq = pd.factorize(keyed)
            if (keyed == -1).any():
                kc[keyed == -1] = -1
        else:
            if head in ("first", "last"):
                n = int(arg)
                arr = pa.array(self.dict, pa.large_string())
                arr = (pc.utf8_slice_codeunits(arr, 0, n) if head == "first"
                       else pc.utf8_slice_codeunits(arr, -n, 2 ** 31 - 1))
                keyed = arr.to_numpy(zero_copy_only=False)
            else:
                f = transform_fn(transform, self.method == "date")
                dates = self.dates
                keyed = [f(v, tuple(dates[i]) if dates is not None and dates[i, 0] else None)
                         for i, v in enumerate(self.dict)]
                keyed = np.array(keyed, dtype=object)
            kc, uniq = pd.factorize(keyed)
            kc[keyed == ""] = -1
        kc = np.append(kc, -1)  # index -1 (missing value) -> -1
        return kc[self.left], kc[self.right], len(uniq)

    def levels(self, li, ri):
        a, b = self.left[li], self.right[ri]
        missing = (a < 0) | (b < 0)
        lev = np.zeros(len(a), dtype=np.int64)
        diff = ~missing & (a != b)
        if self.method == "exact":
            lev[diff] = 1
        elif self.method in ("jaro-winkler", "levenshtein"):
            idx = np.flatnonzero(diff)
            key = a[idx] * len(self.dict) + b[idx]
            inv, uk = pd.factorize(key)
            d = np.array(self.dict, dtype=object)
            sa, sb = d[uk // len(self.dict)], d[uk % len(self.dict)]
            if self.method == "jaro-winkler":
                if cpdist is not None:
                    sim = cpdist(list(sa), list(sb), scorer=JaroWinkler.similarity, workers=-1)
                else:
                    sim = np.array([JaroWinkler.similarity(x, y) for x, y in zip(sa, sb)])
            else:
                from rapidfuzz.distance import Levenshtein
                sim = cpdist(list(sa), list(sb), scorer=Levenshtein.normalized_similarity,
                             workers=-1)
            sim = np.asarray(sim, dtype=np.float64)
            ul = np.full(len(uk), len(self.bands) + 1, dtype=np.int64)
            for j in range(len(self.bands) - 1, -1, -1):
                ul[sim >= self.bands[j]] = j + 1
            ul[sim >= 1.0] = 0
            lev[idx] = ul[inv]
        elif self.method == "date":
            idx = np.flatnonzero(diff)
            da, db = self.dates[a[idx]], self.dates[b[idx]]
            ya, ma, dda = da[:, 0], da[:, 1], da[:, 2]
            yb, mb, ddb = db[:, 0], db[:, 1], db[:, 2]
            full = (ma > 0) & (dda > 0) & (mb > 0) & (ddb > 0)
            same_y = ya == yb
            swapped = full & same_y & (ma == ddb) & (dda == mb)
            if self.digits is None:  # the 8 digits of YYYYMMDD, once per distinct date
                n8 = self.dates[:, 0] * 10000 + self.dates[:, 1] * 100 + self.dates[:, 2]
                self.digits = ((n8[:, None] // 10 ** np.arange(8)) % 10).astype(np.uint8)
            one_digit = np.zeros(len(idx), dtype=bool)
            f = np.flatnonzero(full)
            one_digit[f] = (self.digits[a[idx[f]]] != self.digits[b[idx[f]]]).sum(1) == 1
            l = np.full(len(idx), 4, dtype=np.int64)
            l[same_y] = 3
            l[one_digit] = 2
            l[swapped] = 1
            lev[idx] = l
        else:
            raise SystemExit(f"method `{self.method}` is not in this peer")
        lev[missing] = self.n_levels  # the "missing" digit
        return lev


def read_table(path, id_col, cols):
    usecols = list(dict.fromkeys([id_col] + cols))
    try:
        df = pd.read_csv(path, engine="pyarrow", dtype=str, usecols=usecols,
                         keep_default_na=False, na_values=[""])
    except (ImportError, ValueError):
        df = pd.read_csv(path, dtype=str, usecols=usecols, keep_default_na=False, na_values=[""])
    return df


def block(fields_by_name, passes, n_right):
    keys_all = []
    for p in passes:
        lk = rk = None
        for part in p["keys"]:
            fname, _, transform = part.partition(":")
            f = fields_by_name[fname]
            l, r, n = f.key_codes(transform or "exact")
            if lk is None:
                lk, rk = l, r
            else:
                lk = np.where((lk < 0) | (l < 0), -1, lk * (n + 1) + l)
                rk = np.where((rk < 0) | (r < 0), -1, rk * (n + 1) + r)
                # keep keys compact so the product never overflows
                both = np.concatenate([lk, rk])
                inv, _ = pd.factorize(both)
                inv[both < 0] = -1
                lk, rk = inv[:len(lk)], inv[len(lk):]
        cap = p.get("max_block_pairs", MAX_BLOCK_PAIRS)
        L = pd.DataFrame({"k": lk, "l": np.arange(len(lk))})
        R = pd.DataFrame({"k": rk, "r": np.arange(len(rk))})
        L, R = L[L.k >= 0], R[R.k >= 0]
        lc, rc = L.k.value_counts(), R.k.value_counts()
        size = lc.mul(rc, fill_value=0)
        big = size.index[size > cap]
        if len(big):
            print(f"peer: pass {p['keys']}: {len(big)} blocks over {cap} pairs skipped",
                  file=sys.stderr)
            L, R = L[~L.k.isin(big)], R[~R.k.isin(big)]
        m = L.merge(R, on="k", how="inner", sort=False)
        keys_all.append(m.l.to_numpy(np.int64) * n_right + m.r.to_numpy(np.int64))
    code = np.concatenate(keys_all)
    code.sort()
    code = code[np.r_[True, code[1:] != code[:-1]]]
    return code // n_right, code % n_right


def em(patterns, counts, n_levels, p0):
    """Two-class EM under conditional independence on pattern counts; the last level of each
    field (its "missing" digit) contributes nothing."""
    P, K = patterns.shape
    onehot = []  # per field: P x n_levels indicator (all-zero row when missing)
    for k in range(K):
        oh = np.zeros((P, n_levels[k]))
        obs = patterns[:, k] < n_levels[k]
        oh[np.flatnonzero(obs), patterns[obs, k]] = 1.0
        onehot.append(oh)
    m, u = [], []
    for k in range(K):
        n = n_levels[k]
        mk = np.geomspace(1.0, 0.01, n)
        mk[0] = 8.0
        m.append(mk / mk.sum())
        freq = (onehot[k] * counts[:, None]).sum(0) + 1.0
        u.append(freq / freq.sum())
    p = p0
    for it in range(1, EM_MAX_IT + 1):
        lm = sum(onehot[k] @ np.log(m[k]) for k in range(K))
        lu = sum(onehot[k] @ np.log(u[k]) for k in range(K))
        lo = np.log(p) - np.log1p(-p) + lm - lu
        g = 1.0 / (1.0 + np.exp(-np.clip(lo, -700, 700)))
        cm, cu = counts * g, counts * (1.0 - g)
        change = 0.0
        for k in range(K):
            nm = np.maximum(cm @ onehot[k], FLOOR)
            nu = np.maximum(cu @ onehot[k], FLOOR)
            nm, nu = nm / nm.sum(), nu / nu.sum()
            change = max(change, np.abs(nm - m[k]).max(), np.abs(nu - u[k]).max())
            m[k], u[k] = nm, nu
        np_ = min(max(cm.sum() / counts.sum(), FLOOR), 1 - 1e-9)
        change = max(change, abs(np_ - p))
        p = np_
        if change < EM_TOL:
            break
    w = sum(onehot[k] @ (np.log(m[k]) - np.log(u[k])) for k in range(K))
    if w[np.argmin(patterns.sum(1))] < 0:  # classes swapped: the all-agree pattern must favour M
        m, u, p = u, m, 1 - p
        w = -w
    return w, p, m, u, it


def match(li, ri, theta, n_left, n_right):
    keep = theta > 0
    li, ri, th = li[keep], ri[keep], theta[keep]
    e = len(li)
    if e == 0:
        return np.zeros(0, np.int64)
    g = coo_matrix((np.ones(e), (li, n_left + ri)), shape=(n_left + n_right,) * 2).tocsr()
    _, lab = connected_components(g, directed=False)
    comp = lab[li]
    order = np.lexsort((-th, comp))
    comp_s = comp[order]
    starts = np.flatnonzero(np.r_[True, comp_s[1:] != comp_s[:-1]])
    ends = np.r_[starts[1:], e]
    sizes = ends - starts
    nl_c = pd.Series(li[order]).groupby(comp_s).nunique().to_numpy()
    nr_c = pd.Series(ri[order]).groupby(comp_s).nunique().to_numpy()
    # one pair, or a star (one record on one side): the best pair of the component
    easy = (sizes == 1) | (nl_c == 1) | (nr_c == 1)
    chosen = [order[starts[easy]]]
    for s, t in zip(starts[~easy], ends[~easy]):
        ed = order[s:t]
        ul, a = np.unique(li[ed], return_inverse=True)
        ur, b = np.unique(ri[ed], return_inverse=True)
        if len(ul) * len(ur) <= DENSE_CELLS:
            w = np.zeros((len(ul), len(ur)))
            w[a, b] = th[ed]
            rr, cc = linear_sum_assignment(w, maximize=True)
            pos = w[rr, cc] > 0
            lookup = np.full((len(ul), len(ur)), -1, np.int64)
            lookup[a, b] = ed
            chosen.append(lookup[rr[pos], cc[pos]])
        else:
            nl, nr, x = len(ul), len(ur), th[ed]
            big = x.max() + 1.0
            rows = np.concatenate([a, np.arange(nl), nl + np.arange(nr), nl + b])
            cols = np.concatenate([b, nr + np.arange(nl), np.arange(nr), nr + a])
            vals = np.concatenate([big - x, np.full(nl, big), np.full(nr, big), np.full(len(ed), big)])
            sm = coo_matrix((vals, (rows, cols)), shape=(nl + nr, nl + nr)).tocsr()
            rr, cc = min_weight_full_bipartite_matching(sm)
            real = (rr < nl) & (cc < nr)
            lookup = pd.Series(ed, index=a.astype(np.int64) * nr + b)
            chosen.append(lookup.loc[rr[real].astype(np.int64) * nr + cc[real]].to_numpy())
    sel = np.concatenate(chosen)
    return np.flatnonzero(keep)[sel]


def main():
    if len(sys.argv) == 4 and sys.argv[1] == "--score":
        print(score(sys.argv[2], sys.argv[3]))
        return
    if len(sys.argv) != 3:
        raise SystemExit(__doc__.split("\n\n")[1])
    src, out = sys.argv[1], sys.argv[2]
    os.makedirs(out, exist_ok=True)
    t_all = t0 = time.perf_counter()
    times = {}

    def lap(name):
        nonlocal t0
        t = time.perf_counter()
        times[name] = t - t0
        t0 = t

    cfg_path = os.path.join(src, "config.toml") if os.path.isdir(src) else src
    base = os.path.dirname(os.path.abspath(cfg_path))
    with open(cfg_path, "rb") as fh:
        cfg = tomllib.load(fh)
    specs = cfg["field"]
    lcols = [f.get("left", f["name"]) for f in specs]
    rcols = [f.get("right", f["name"]) for f in specs]
    lid, rid = cfg["left"]["id"], cfg["right"]["id"]
    left = read_table(os.path.join(base, cfg["left"]["path"]), lid, lcols)
    right = read_table(os.path.join(base, cfg["right"]["path"]), rid, rcols)
    lap("read")

    fields = [Field(s, left[lc], right[rc]) for s, lc, rc in zip(specs, lcols, rcols)]
    by_name = {f.name: f for f in fields}
    n_left, n_right = len(left), len(right)
    lap("clean")

    li, ri = block(by_name, cfg.get("block", []), n_right)
    lap("block")

    n_levels = np.array([f.n_levels for f in fields])
    radix = n_levels + 1
    place = np.cumprod(np.r_[1, radix[:-1]])
    code = np.zeros(len(li), dtype=np.int64)
    for f, pl in zip(fields, place):
        code += f.levels(li, ri) * pl
    lap("compare")

    inv, uniq = pd.factorize(code)
    counts = np.bincount(inv)
    patterns = (uniq[:, None] // place[None, :]) % radix[None, :]
    p0 = min(max(min(n_left, n_right) / max(len(li), 1), 1e-6), 0.5)
    pw, p, m, u, iters = em(patterns, counts.astype(np.float64), n_levels, p0)
    weight = pw[inv]
    theta = weight + np.log(p / (1 - p))
    lap("fit")

    sel = match(li, ri, theta, n_left, n_right)
    lap("match")

    sel = sel[np.argsort(li[sel], kind="stable")]
    post = 1.0 / (1.0 + np.exp(-theta[sel]))
    lids = pa.chunked_array(chunks(left[lid])).take(pa.array(li[sel]))
    rids = pa.chunked_array(chunks(right[rid])).take(pa.array(ri[sel]))
    table = pa.table({"left_id": lids,
                      "right_id": rids,
                      "weight": pa.array(np.round(weight[sel], 6)),
                      "posterior": pa.array(np.round(post, 6))})
    pacsv.write_csv(table, os.path.join(out, "links.csv"),
                    pacsv.WriteOptions(quoting_style="needed"))
    lap("write")
    total = time.perf_counter() - t_all

    err = sys.stderr
    print(f"peer: {n_left} left, {n_right} right; candidate pairs {len(li)}; patterns "
          f"{len(uniq)}; EM {iters} iterations, p = {p:.4f} (expected true pairs "
          f"{p * len(li):.0f}); links {len(sel)}", file=err)
    for k in ("read", "clean", "block", "compare", "fit", "match", "write"):
        print(f"time: {k} {times[k]:.2f}s", file=err)
    print(f"time: total {total:.2f}s", file=err)
    truth = os.path.join(base, "truth.csv")
    if os.environ.get("PEER_SCORE", "1") != "0" and os.path.exists(truth):
        print(score(os.path.join(out, "links.csv"), truth), file=err)
    err.flush()
    sys.stdout.flush()
    os._exit(0)  # skip the interpreter's teardown of a few million objects (kind to the peer)


def score(links_path, truth_path):
    """Precision and recall of a links file (first two columns: left id, right id)."""
    got = pd.read_csv(links_path, dtype=str, keep_default_na=False).iloc[:, :2]
    truth = pd.read_csv(truth_path, dtype=str, keep_default_na=False).iloc[:, :2]
    got.columns = truth.columns = ["l", "r"]
    got, truth = got.drop_duplicates(), truth.drop_duplicates()
    tp = len(got.merge(truth, on=["l", "r"]))
    prec = tp / len(got) if len(got) else 0.0
    rec = tp / len(truth) if len(truth) else 0.0
    return (f"quality: precision {prec:.4f} recall {rec:.4f} (links {len(got)}, true pairs "
            f"{len(truth)}, correct {tp})")


if __name__ == "__main__":
    main()
