"""Which methods can be trusted on this dataset: the trust rules.

Every method's result for every effect gets ``trusted`` (True/False) and one
plain reason.  Two kinds of evidence decide it:

1. **Rules** with published sources (the table :data:`TRUST_RULES`, also in
   DEVELOPERS.md), applied to facts the diagnostics report about this
   dataset: cell sizes, unequal variances and how they pair with cell sizes.
2. **The size check** (:mod:`audit.verdict.calibration`): the method's Type I
   error estimated on simulated null datasets shaped like this one.  A method
   found liberal there is not trusted, whatever the rules say; one found
   conservative stays trusted and is marked so.

A method is trusted when no rule and no size-check row withdraws trust.  The
first rule that withdraws it gives the reason (the rules are ordered from the
most basic: a p-value that does not exist, then validity, then data-shaped
evidence).  Untrusted methods do not vote in the verdict.

Caution: these rules encode measured and published behaviour; they support a
statistician's judgement and do not replace it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["TrustRule", "MethodTrust", "TRUST_RULES", "assess_trust", "trimmed_kept", "Primary", "choose_primary",
           "PRIMARY_MAX_SIZE", "PRIMARY_ORDER", "POWER_TIE", "COMPARABLE_POWER", "CALIBRATE_MAX", "adopt_primary"]


@dataclass(frozen=True, kw_only=True)
class TrustRule:
    """One row of the rule table.

    Attributes
    ----------
    id : str
        Stable rule id (cited in ``MethodTrust.rule``).
    methods : tuple of str
        Method ids it applies to.
    when : str
        The condition, in words.
    source : str
        Where the rule comes from.
    """

    id: str
    methods: tuple[str, ...]
    when: str
    source: str


#: the rule table (order matters: the first rule that applies gives the reason)
TRUST_RULES: tuple[TrustRule, ...] = (
    TrustRule(id="no-p", methods=("*",), when="the method gave no p-value on these data",
              source="common practice"),
    TrustRule(id="rank-transform", methods=("rank-transform",),
              when="always: ranking creates interaction out of main effects, and the rank-transform tests "
                   "are unreliable in factorial designs",
              source="Blair, Sawilowsky & Higgins 1987; Sawilowsky 1990; METHODS.md 10a (size .807 with "
                     "main effects)"),
    TrustRule(id="pseudo-replication", methods=("*",),
              when="an experimental unit was observed more than once: every test here treats the "
                   "repeated observations as independent",
              source="Hurlbert 1984"),
    TrustRule(id="welch-small-cells", methods=("welch-james",),
              when="without a size check: a cell has 3 or fewer observations: the variance estimates have at "
                   "most 2 df and the test can run liberal (with a size check, the check decides)",
              source="Johansen 1980 (the approximation needs moderate n); METHODS.md 10a"),
    TrustRule(id="trimmed-small-cells", methods=("welch-james-trimmed",),
              when="a cell keeps fewer than 4 observations after 20% trimming",
              source="Wilcox 2017 (Introduction to Robust Estimation, from memory); METHODS.md 10a "
                     "(size .103 in cells of 4-16 with unequal variances)"),
    TrustRule(id="studentized-small-cells", methods=("permutation-studentized",),
              when="a cell has 5 or fewer observations",
              source="Pauly, Brunner & Konietschke 2015 (asymptotic validity); METHODS.md 10a (size .077-.082 "
                     "in cells of 4-5)"),
    TrustRule(id="wild-small-cells", methods=("wild-bootstrap",),
              when="a cell has 3 or fewer observations: sign flips then swap each cell's spread and mean "
                   "deviation",
              source="Davidson & Flachaire 2008; common practice"),
    TrustRule(id="hc-single", methods=("hc3-wald", "hc4-wald"),
              when="a cell has one observation (its leverage is 1)",
              source="Long & Ervin 2000; Cribari-Neto 2004"),
    TrustRule(id="equal-variance-unequal-n", methods=("classical-f", "permutation-freedman-lane",
                                                      "permutation-ter-braak"),
              when="without a size check: the homogeneity check grades the unequal variances warning or serious: given how they "
                   "pair with the cell sizes they move the classical F's level well away from alpha (liberal "
                   "when large variances sit in small cells, conservative in the reverse)",
              source="Box 1954; Glass, Peckham & Sanders 1972; Anderson & ter Braak 2003; METHODS.md 10a "
                     "(sizes .13-.29)"),
    TrustRule(id="art-unequal-variances", methods=("aligned-rank-transform",),
              when="variances differ beyond chance across cells",
              source="Leys & Schumann 2010; METHODS.md 10a (size .177 in a 2 x 2 with one cell SD x 4)"),
    TrustRule(id="art-unbalanced", methods=("aligned-rank-transform",),
              when="cell sizes differ: with the published alignment (marginal means of the observations) the "
                   "aligned responses keep part of the other effects",
              source="this project's simulation (benchmarks/sim_art_alignment.py: size .073-.080 for the "
                     "interaction and .63-.72 for main effects in an unbalanced 3 x 3)"),
    TrustRule(id="hc4-warm", methods=("hc4-wald",),
              when="no size check was run: HC4 with the F(q, N - m) reference runs warm even on clean data",
              source="METHODS.md 10a (size .066, 99% CI .054-.080, pooled over clean conditions)"),
    TrustRule(id="size-check-liberal", methods=("*",),
              when="the size check on null datasets shaped like this one finds the method liberal (the "
                   "classical F's row also speaks for the residual permutations, which lean on the same "
                   "equal-variance assumption); when it finds the classical F's size acceptable, the "
                   "equal-variance rule above is not applied",
              source="METHODS.md 10b; this dataset's size check"),
    TrustRule(id="tukey-only-form", methods=("tukey-one-df",),
              when="never withdrawn, but it detects only the multiplicative (a_j b_k) form of interaction",
              source="Tukey 1949"),
)

_RULES = {r.id: r for r in TRUST_RULES}

#: methods whose validity rests on equal variances like the classical F's; the
#: classical F's size-check row speaks for all three (METHODS.md 10a: their
#: sizes move together under every condition measured)
_EQUAL_VARIANCE_METHODS = ("classical-f", "permutation-freedman-lane", "permutation-ter-braak")

#: the trimming proportion of the trimmed Welch-James test
TRIM = 0.2


def trimmed_kept(counts: np.ndarray, gamma: float = TRIM) -> np.ndarray:
    """Observations kept per cell by symmetric trimming: n - 2 floor(gamma n).

    Parameters
    ----------
    counts : ndarray of int
    gamma : float
    """
    c = np.asarray(counts, dtype=int)
    return c - 2 * np.floor(gamma * c).astype(int)


@dataclass(frozen=True, kw_only=True)
class MethodTrust:
    """Whether one method's test of one effect is trusted here, and why.

    Attributes
    ----------
    method : str
    effect : str
    trusted : bool
    reason : str
        One plain sentence (why trusted, or why not).
    rule : str or None
        The rule id that decided (None when no rule withdrew trust).
    conservative : bool
        The size check found it conservative on data shaped like these.
    """

    method: str
    effect: str
    trusted: bool
    reason: str
    rule: str | None
    conservative: bool = False

    def to_dict(self) -> dict:
        return {"method": self.method, "effect": self.effect, "trusted": self.trusted,
                "reason": self.reason, "rule": self.rule, "conservative": self.conservative}


def _pct(x: float) -> str:
    return f"{100 * x:.0f}%" if x >= 0.1 else f"{100 * x:.1f}%"


def _distorts_classical(h) -> bool:
    return bool(h is not None and h.distorts_classical)


def _one(m, *, min_n: int, min_kept: int, unequal_n: bool, homog, indep, calib_row, calib_f, alpha: float) -> MethodTrust:
    mid, eff = m.id, m.effect

    def no(rule: str, reason: str) -> MethodTrust:
        return MethodTrust(method=mid, effect=eff, trusted=False, reason=reason, rule=rule)

    if m.p is None:
        why = m.notes[0] if m.notes else "no p-value could be computed"
        return no("no-p", f"not computed on these data: {why}")
    if mid == "rank-transform" or not m.valid_for_interaction and eff == "AB":
        return no("rank-transform", "ranking turns main effects into interaction, so the rank transform does "
                                    "not test the interaction validly (Blair, Sawilowsky & Higgins 1987)")
    if indep is not None and indep.pseudo_replication:
        return no("pseudo-replication", "an experimental unit was observed more than once, so the "
                                        "observations are not independent")
    if mid == "welch-james" and min_n <= 3 and calib_row is None:
        return no("welch-small-cells", f"the smallest cell has {min_n} observation(s); Welch-James runs "
                                       "liberal with so few per cell")
    if mid == "welch-james-trimmed" and min_kept < 4:
        return no("trimmed-small-cells", f"20% trimming keeps only {min_kept} observation(s) in the smallest "
                                         "cell")
    if mid == "permutation-studentized" and min_n <= 5:
        return no("studentized-small-cells", f"the smallest cell has {min_n} observations; the studentized "
                                             "permutation runs liberal in cells of 5 or fewer")
    if mid == "wild-bootstrap" and min_n <= 3:
        return no("wild-small-cells", f"the smallest cell has {min_n} observation(s); sign flips then swap "
                                      "each cell's spread and mean deviation")
    if mid in ("hc3-wald", "hc4-wald") and min_n <= 1:
        return no("hc-single", "a cell has a single observation, whose leverage is 1")
    if mid in _EQUAL_VARIANCE_METHODS:
        ref = calib_f if calib_f is not None else None
        if ref is not None and ref.status == "liberal":
            like = "" if mid == "classical-f" else "it leans on equal variances like the classical F, which "
            return no("size-check-liberal", f"{like}on data shaped like yours "
                                            f"{'it ' if not like else ''}rejects a true null about {_pct(ref.size)} "
                                            f"of the time (alpha {alpha:g})")
        if ref is None and _distorts_classical(homog):
            side = {"negative": "large variances sit in small cells, which makes it liberal",
                    "positive": "large variances sit in large cells, which makes it conservative"}.get(
                homog.pairing, "the cell variances differ enough to move its level away from alpha")
            return no("equal-variance-unequal-n", f"it assumes equal variances, and here {side}")
    if mid == "aligned-rank-transform" and homog is not None and homog.unequal_variances:
        return no("art-unequal-variances", "the aligned rank transform runs liberal when variances differ "
                                           "across cells, as they do here")
    if mid == "aligned-rank-transform" and unequal_n:
        return no("art-unbalanced", "with unequal cell sizes the aligned responses keep part of the other "
                                    "effects, and the test runs liberal")
    if calib_row is not None and getattr(calib_row, "status", None) == "liberal":
        size = calib_row.size
        return no("size-check-liberal", f"on data shaped like yours it rejects a true null about {_pct(size)} "
                                        f"of the time (alpha {alpha:g})")
    if mid == "hc4-wald" and calib_row is None:
        return no("hc4-warm", "without a size check HC4 is not relied on: with the F reference it runs warm "
                              "even on clean data")
    conservative = calib_row is not None and getattr(calib_row, "status", None) == "conservative"
    if conservative:
        reason = (f"trusted, but conservative here: on data shaped like yours it rejects a true null about "
                  f"{_pct(calib_row.size)} of the time")
    elif calib_row is not None and getattr(calib_row, "status", None) == "ok":
        reason = f"no rule applies, and its size on data shaped like yours is about {_pct(calib_row.size)}"
        if calib_row.size > 1.2 * alpha:
            reason += " (somewhat above alpha, not clearly so)"
    elif mid == "tukey-one-df":
        reason = "the only test of interaction with one observation per cell; it detects only the " \
                 "multiplicative form"
    else:
        reason = "no trust rule applies to these data"
    return MethodTrust(method=mid, effect=eff, trusted=True, reason=reason, rule=None, conservative=conservative)


def assess_trust(methods, *, counts, alpha: float, homogeneity=None, independence=None, calibration=None) -> tuple[MethodTrust, ...]:
    """Apply the trust rules to every method result.

    Parameters
    ----------
    methods : sequence of MethodResult
    counts : ndarray (J, K) of int
        Cell sizes.
    alpha : float
    homogeneity : HomogeneityFacts, optional
    independence : IndependenceFacts, optional
    calibration : object, optional
        The size check; ``calibration.row(method, effect)`` returns a row
        with ``status`` and ``size``, or None when that method was not
        checked.

    Returns
    -------
    tuple of MethodTrust, one per method result, in the same order.
    """
    c = np.asarray(counts)
    filled = c[c > 0]
    min_n = int(filled.min()) if filled.size else 0
    min_kept = int(trimmed_kept(filled).min()) if filled.size else 0
    unequal_n = bool(filled.size and filled.max() != filled.min())
    out = []

    def crow(mid, eff):
        if calibration is None:
            return None
        try:
            r = calibration.row(mid, eff)
        except KeyError:
            return None
        return None if getattr(r, "status", None) == "not-run" else r

    for m in methods:
        row = crow(m.id, m.effect)
        out.append(_one(m, min_n=min_n, min_kept=min_kept, unequal_n=unequal_n, homog=homogeneity, indep=independence,
                        calib_row=row, calib_f=crow("classical-f", m.effect), alpha=alpha))
    return tuple(out)


# ----------------------------------------------------------------------------- the primary test

#: a size-checked method can be the primary test when its simulated size is at most this multiple
#: of alpha (and the size check does not call it liberal); our choice, set with
#: benchmarks/study_verdict.py (README "How often is the verdict right?")
PRIMARY_MAX_SIZE = 1.5
#: (up to it the decision is taken at alpha: an acceptable size, within [.025, .075] at
#: alpha .05); above it and up to the next multiple, a heteroscedasticity-robust method (not the
#: classical F, whose null distribution leans on the simulated variances: not pivotal) can still
#: be the primary at its calibrated level (our
#: choice: beyond it the calibration leans too hard on the simulated variances)
CALIBRATE_MAX = 4.0
#: powers within this of the best are a tie, broken by PRIMARY_ORDER (the Monte Carlo spread of a
#: difference of two powers estimated on the same simulated errors is about 0.01 at R = 2,000)
POWER_TIE = 0.02
#: a trusted method whose simulated power is at least the primary's minus this is of comparable
#: power: its dissent is material (our choice)
COMPARABLE_POWER = 0.05
#: order of preference among size-checked methods of tied power, and the fixed order by design
#: when no size check ran (the classical F first when the homogeneity check finds no distortion
#: of its level, since it is the most powerful test under equal variances)
PRIMARY_ORDER = ("classical-f", "welch-james", "hc3-wald", "hc4-wald")


@dataclass(frozen=True, kw_only=True)
class Primary:
    """The test whose decision the interaction verdict follows.

    Attributes
    ----------
    method : str or None
        Method id (None: no method qualifies; the verdict then needs two or more trusted methods
        agreeing, and says so).
    basis : str
        'size-check' (the most powerful size-checked method whose simulated size is acceptable),
        'fixed-order' (no size check: the first trusted method of the fixed order by design) or
        'none'.
    reason : str
        Why it was chosen, in one sentence.
    size, power : float or None
        Its simulated size and power (size-check basis).
    powers : tuple of (method, power)
        Size-adjusted simulated power of every size-checked method.
    level : float or None
        The p below which the primary rejects: alpha, or its calibrated level when its
        simulated size is above PRIMARY_MAX_SIZE x alpha.
    """

    method: str | None
    basis: str
    reason: str
    size: float | None = None
    power: float | None = None
    powers: tuple = ()
    level: float | None = None

    def power_of(self, method: str):
        return dict(self.powers).get(method)

    def to_dict(self) -> dict:
        return {"method": self.method, "basis": self.basis, "reason": self.reason, "size": self.size,
                "power": self.power, "level": self.level}


def choose_primary(methods, trust, *, alpha: float, calibration=None, homogeneity=None,
                   effect: str = "AB") -> Primary:
    """The primary test of ``effect``: chosen from the design and the size check only, never
    from the observed p-values.

    With a size check: among the size-checked methods that are trusted (or untrusted only
    because the size check finds them liberal) and whose simulated size, less the bias from
    the noise of the simulated variances, is at most ``CALIBRATE_MAX`` x alpha, the one with
    the highest size-adjusted simulated power (ties within ``POWER_TIE`` broken by
    ``PRIMARY_ORDER``).  Its decision is taken at alpha, or, when its simulated size (less
    the bias) is above ``PRIMARY_MAX_SIZE`` x alpha, at its
    calibrated level ``critical_p`` (the p below which it rejects alpha of the simulated null
    datasets: a parametric-bootstrap calibration; Welch-James and HC only, whose statistics are
    close to pivotal).  The classical F is not a candidate when the
    homogeneity check grades the distortion of its level concern or critical (the safer of the
    two readings is kept).  Without a size check: the fixed order.

    Parameters
    ----------
    methods : sequence of MethodResult
    trust : sequence of MethodTrust
        Same order as ``methods``.
    alpha : float
    calibration : Calibration, optional
        The size check (with each interaction row's simulated power).
    homogeneity : HomogeneityFacts, optional
        For the fixed order when no size check ran.
    effect : str
    """
    tr = {m.id: t for m, t in zip(methods, trust) if m.effect == effect and m.p is not None}
    ok = {mid for mid, t in tr.items() if t.trusted}
    rows = {}
    if calibration is not None:
        for mid in PRIMARY_ORDER:
            try:
                r = calibration.row(mid, effect)
            except KeyError:
                continue
            if r.status != "not-run" and r.size is not None:
                rows[mid] = r
    powers = tuple((mid, _adj(r)) for mid, r in rows.items() if _adj(r) is not None)
    if rows:
        def usable(mid):
            t = tr.get(mid)
            if t is None or not (t.trusted or t.rule == "size-check-liberal"):
                return False
            if mid == "classical-f" and homogeneity is not None and homogeneity.distorts_classical:
                return False   # the homogeneity check finds its level distorted: the safer reading is kept
            r = rows[mid]
            cap = PRIMARY_MAX_SIZE if mid == "classical-f" else CALIBRATE_MAX
            return r.size - (r.bias or 0.0) <= cap * alpha and (t.trusted or r.critical_p is not None)

        fit_ = [mid for mid in rows if usable(mid)]
        if fit_:
            with_power = [mid for mid in fit_ if _adj(rows[mid]) is not None]
            lam = getattr(calibration, "power_noncentrality", None)
            if with_power:
                best = max(_adj(rows[mid]) for mid in with_power)
                pick = next(mid for mid in PRIMARY_ORDER if mid in with_power and _adj(rows[mid]) >= best - POWER_TIE)
            else:
                pick = next(mid for mid in PRIMARY_ORDER if mid in fit_)
            r = rows[pick]
            b = r.bias or 0.0
            warm = r.size - b > PRIMARY_MAX_SIZE * alpha and r.critical_p is not None
            level = min(alpha, r.critical_p) if warm else alpha
            against = f" against interactions of noncentrality {lam:.3g}" if lam else ""
            pw = _adj(r)
            if warm:
                how = (f"the most powerful method here once each is held to its size; it rejects a true null "
                       f"{_pct1(r.size - b)} of the time at alpha {_pct1(alpha)} on data shaped like yours, so "
                       f"its decision is taken at p < {level:.3g}, the level at which it keeps alpha")
            elif pw is not None:
                how = (f"the most powerful method that keeps its size on data shaped like yours "
                       f"({_pct1(r.size - b)} at alpha {_pct1(alpha)}; power {_pct(pw)}{against})")
            else:
                how = (f"the only size-checked method here, and it keeps its size on data shaped like yours "
                       f"({_pct1(r.size - b)} at alpha {_pct1(alpha)})")
            return Primary(method=pick, basis="size-check", size=r.size - b, power=pw, powers=powers,
                           level=level, reason=f"{pick}: {how}")
        return Primary(method=None, basis="none", powers=powers,
                       reason="no size-checked method keeps its size on data shaped like yours, even at a "
                              "calibrated level")
    order = PRIMARY_ORDER[:3] + ("tukey-one-df",)
    if homogeneity is not None and homogeneity.distorts_classical:
        order = order[1:]
    pick = next((mid for mid in order if mid in ok), None)
    if pick is None:
        return Primary(method=None, basis="none", reason="no size check ran and no method of the fixed order is "
                                                        "trusted here")
    why = {"classical-f": "the most powerful test under equal variances, and the homogeneity check finds no "
                          "distortion of its level",
           "welch-james": "robust to unequal variances, with every cell large enough for it",
           "hc3-wald": "robust to unequal variances in small cells",
           "tukey-one-df": "the only test of interaction with one observation per cell"}[pick]
    return Primary(method=pick, basis="fixed-order", level=alpha,
                   reason=f"{pick}: no size check ran, so the fixed order by design chose it ({why})")


def adopt_primary(methods, trust, primary: Primary, *, alpha: float, effect: str = "AB") -> tuple:
    """The trust list with the primary trusted: a method the size check finds liberal is
    trusted as the primary at its calibrated level (its decision is taken there)."""
    if primary is None or primary.method is None:
        return tuple(trust)
    out = []
    for m, t in zip(methods, trust):
        if m.id == primary.method and m.effect == effect and not t.trusted and t.rule == "size-check-liberal":
            t = MethodTrust(method=t.method, effect=t.effect, trusted=True, rule=None,
                            reason=f"trusted as the primary test at its calibrated level p < {primary.level:.3g} "
                                   f"(at alpha {alpha:g} {t.reason[0].lower() + t.reason[1:]})")
        out.append(t)
    return tuple(out)


def _adj(row):
    """The size-adjusted simulated power of a size-check row (None when not simulated)."""
    a = getattr(row, "adjusted_power", None)
    return a if a is not None else getattr(row, "power", None)


def _pct1(x: float) -> str:
    return f"{100 * x:.1f}%"
