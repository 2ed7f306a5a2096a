"""Reconcile a reported test with the data (METHODS.md section 9).

A reported line such as ``F(2, 54) = 4.11, p = .022`` is checked item by item:

- ``df1`` against the effect's df in these data;
- ``df2`` against the error df N - m; the N it implies is df2 + m, compared with the
  data's N (a difference points to exclusions or a different analysis);
- ``F`` against the recomputed F of every SS type, within the reported precision's
  rounding interval [F - 0.5 10^-d, F + 0.5 10^-d] (with every cell filled the three
  types give the same interaction F; for main effects in unbalanced designs they differ,
  and the check says which type reproduces the line);
- ``p`` against F and the reported df with rounding carried through: the p interval
  implied by the F interval must meet the reported p's own rounding interval
  (``p < .05`` / ``p > .10`` are checked as inequalities; ``ns`` as p >= alpha).  A claim
  giving a p value without F is checked against the data's p of every SS type;
- ``p-format``: ``p = .000`` is a reporting error (it should read ``p < .001``), flagged
  as a warning, not by itself a failure to reproduce.

The words ``present`` / ``absent`` have nothing to reconcile (``reproduced`` is None).
Severity words are the project's: ok, note, warning, serious; a serious check means
the reported line cannot come from these data.

References
----------
.. [1] APA Publication Manual, 7th ed. (2020), section 6.36: exact p values to two or
       three decimals, p < .001 below that (from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from scipy import stats

from ..errors import OptionError
from .claim import Claim

__all__ = ["ReconcileCheck", "ClosestMatch", "Reconciliation", "reconcile", "decision_of_claim"]

SS_TYPES = ("I", "II", "III")
# relative slack on rounding-interval edges, for binary floating point only
_EDGE = 1e-9


@dataclass(frozen=True, kw_only=True)
class ReconcileCheck:
    """One item of a reconciliation.

    Attributes
    ----------
    item : str
        'df1', 'df2', 'F', 'p' or 'p-format'.
    ok : bool
        True when the reported value is consistent with the data.
    severity : str
        'clear' when consistent; 'critical' for an inconsistency that the data cannot
        produce; 'concern' for a reporting-format error ('p = .000'); 'minor' when
        a value cannot be recomputed.
    expected : float, (float, float), str or None
        What the data give: a df, a recomputed F, a p interval, or the correct format.
    found : float, (float, float), str or None
        What the claim reports (an interval for rounded values).
    message : str
        One plain sentence.
    """

    item: str
    ok: bool
    severity: str
    expected: float | tuple[float, float] | str | None
    found: float | tuple[float, float] | str | None
    message: str

    def to_dict(self) -> dict:
        def j(v):
            return list(v) if isinstance(v, tuple) else v

        return {
            "item": self.item,
            "ok": self.ok,
            "severity": self.severity,
            "expected": j(self.expected),
            "found": j(self.found),
            "message": self.message,
        }


@dataclass(frozen=True, kw_only=True)
class ClosestMatch:
    """The SS type whose recomputed test is closest to the claim.

    Attributes
    ----------
    ss_type : str
        'I', 'II' or 'III' (the first in that order when several tie).
    same_as : tuple of str
        Every SS type giving the same F (to 1e-9 relative), ``ss_type`` included.
    F, p : float or None
        The recomputed F and p of that type.
    df1, df2 : int
        The effect's df and the error df in these data.
    """

    ss_type: str
    same_as: tuple[str, ...]
    F: float | None
    p: float | None
    df1: int
    df2: int

    def to_dict(self) -> dict:
        return {
            "ss_type": self.ss_type,
            "same_as": list(self.same_as),
            "F": self.F,
            "p": self.p,
            "df1": self.df1,
            "df2": self.df2,
        }


@dataclass(frozen=True, kw_only=True)
class Reconciliation:
    """A reported claim reconciled with the data.

    Attributes
    ----------
    claim : Claim
    reproduced : bool or None
        True when every check passes, False when any serious check fails, None when
        there is nothing to reconcile (a 'present' / 'absent' claim, or no test
        recomputable from the data).
    checks : tuple of ReconcileCheck
        In the order df1, df2, F, p, p-format (items not reported are left out).
    closest : ClosestMatch or None
        The SS type and F closest to the claim.
    reproducing_types : tuple of str
        SS types whose recomputed F lies in the reported F's rounding interval.
    implied_n : float or None
        df2 + m, the number of observations the reported df2 implies.
    n_obs, n_cells : int
        The data's N and number of non-empty cells m.
    message : str
        One sentence summing up.
    """

    claim: Claim
    reproduced: bool | None
    checks: tuple[ReconcileCheck, ...]
    closest: ClosestMatch | None
    reproducing_types: tuple[str, ...]
    implied_n: float | None
    n_obs: int
    n_cells: int
    message: str

    @property
    def failed(self) -> tuple[str, ...]:
        """Items whose check did not pass (p-format included)."""
        return tuple(c.item for c in self.checks if not c.ok)

    def check(self, item: str) -> ReconcileCheck | None:
        """The check of one item, or None when that item was not reported."""
        for c in self.checks:
            if c.item == item:
                return c
        return None

    def to_dict(self) -> dict:
        return {
            "claim": self.claim.to_dict(),
            "reproduced": self.reproduced,
            "checks": [c.to_dict() for c in self.checks],
            "closest": self.closest.to_dict() if self.closest else None,
            "reproducing_types": list(self.reproducing_types),
            "implied_n": self.implied_n,
            "n_obs": self.n_obs,
            "n_cells": self.n_cells,
            "message": self.message,
        }


# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------


def _g(x: float, digits: int = 4) -> str:
    """Compact number for sentences: whole numbers without decimals."""
    if x is None:
        return "n/a"
    if float(x).is_integer():
        return str(int(x))
    return f"{x:.{digits}g}"


def _pfmt(p: float) -> str:
    if p < 0.0001:
        return f"{p:.2e}"
    return f"{p:.4f}"


def _half_unit(decimals: int | None) -> float:
    return 0.5 * 10.0 ** -(decimals or 0)


def _F_interval(claim: Claim) -> tuple[float, float]:
    """The interval of true F values the reported F can stand for: the rounding
    interval for '=', the stated bound for '<' / '>' (an exact bound, no rounding)."""
    d = claim.F_decimals or 0
    h = _half_unit(d)
    if claim.F_relation in ("<", "<="):
        return 0.0, claim.F
    if claim.F_relation in (">", ">="):
        return claim.F, math.inf
    return max(round(claim.F - h, d + 1), 0.0), round(claim.F + h, d + 1)


def _slack(lo: float, hi: float) -> tuple[float, float]:
    """Widen an interval by a hair, for binary floating point at its edges."""
    return lo - _EDGE * max(1.0, abs(lo)), hi + _EDGE * max(1.0, abs(hi))


def _interval_text(lo: float, hi: float) -> str:
    """'[a, b]' with just enough significant digits to tell a from b (3 to 8)."""
    if not math.isfinite(hi):
        return f"at least {lo:.6g}"
    for k in range(3, 9):
        a, b = f"{lo:.{k}g}", f"{hi:.{k}g}"
        if a != b:
            break
    return f"[{a}, {b}]"


def _F_text(claim: Claim) -> str:
    return f"{claim.F:.{claim.F_decimals or 0}f}" if (claim.F_decimals or 0) <= 12 else f"{claim.F:g}"


def _p_sf(F: float, df1: float, df2: float) -> float:
    if math.isinf(F):
        return 0.0
    v = float(stats.f.sf(F, df1, df2))
    return v if math.isfinite(v) else float(stats.chi2.sf(F * df1, df1))


def _p_consistent(claim: Claim, lo: float, hi: float, alpha: float) -> bool:
    """Can some true p in [lo, hi] have been reported as the claim's p?"""
    if claim.p is None:  # 'ns' without a p value
        return hi >= alpha * (1 - _EDGE)
    rel, p = claim.p_relation, claim.p
    if rel == "=":
        h = _half_unit(claim.p_decimals) * (1 + _EDGE)
        return lo <= p + h and hi >= p - h
    if rel == "<":
        return lo < p * (1 + _EDGE)
    if rel == "<=":
        return lo <= p * (1 + _EDGE)
    if rel == ">":
        return hi > p * (1 - _EDGE)
    return hi >= p * (1 - _EDGE)  # '>='


def _reported_p(claim: Claim, alpha: float):
    """The reported p as an interval (or a bound, as text) for the check's 'found'."""
    if claim.p is None:
        return f"ns (p >= {_g(alpha)})"
    if claim.p_relation == "=":
        d = claim.p_decimals or 0
        h = _half_unit(d)
        return (max(round(claim.p - h, d + 1), 0.0), min(round(claim.p + h, d + 1), 1.0))
    return f"p {claim.p_relation} {_g(claim.p)}"


def _effect_name(effect: str) -> str:
    return {"AB": "the interaction (AB)", "A": "main effect A", "B": "main effect B"}[effect]


def _types_text(types) -> str:
    types = list(types)
    if len(types) == 1:
        return f"Type {types[0]}"
    return "Types " + ", ".join(types[:-1]) + " and " + types[-1]


# ---------------------------------------------------------------------------
# public functions
# ---------------------------------------------------------------------------


def reconcile(claim: Claim, *, anova, n_obs: int, n_cells: int, alpha: float = 0.05,
              F_ranges: dict | None = None) -> Reconciliation:
    """Reconcile a reported claim with the ANOVA recomputed from the data.

    Parameters
    ----------
    claim : Claim
        A parsed claim (:func:`audit.verdict.claim.parse_claim`).
    anova : audit.core.AnovaResult
        The recomputed classical ANOVA of every SS type.
    n_obs : int
        The data's number of observations N.
    n_cells : int
        The number of non-empty cells m.
    alpha : float, default 0.05
        Level used to read an ``ns`` claim (p >= alpha).
    F_ranges : dict, optional
        Summary mode: {(effect, SS type): (F_min, F_max or None)}, the F values
        the data may have while their cell table rounds to what is printed
        (:func:`audit.diagnostics.rounding.effect_F_ranges`).  A reported F (or
        p) is then reproduced when its interval meets that range.

    Returns
    -------
    Reconciliation
    """
    if not (isinstance(alpha, (int, float)) and 0.0 < float(alpha) < 1.0):
        raise OptionError(f"alpha: expected a number strictly between 0 and 1; found {alpha!r}; fix: use e.g. 0.05.")
    n_obs, n_cells = int(n_obs), int(n_cells)
    nothing = not claim.has_test and claim.df1 is None and claim.df2 is None and not claim.ns
    if claim.kind != "test" or nothing:
        return Reconciliation(
            claim=claim,
            reproduced=None,
            checks=(),
            closest=None,
            reproducing_types=(),
            implied_n=None,
            n_obs=n_obs,
            n_cells=n_cells,
            message=f"The claim ({claim.text.strip()!r}) states a conclusion without a test: there is nothing to reconcile.",
        )

    rows = {t: anova.tables[t].row(claim.effect) for t in SS_TYPES}
    ranges = {t: F_ranges[(claim.effect, t)] for t in SS_TYPES if F_ranges and (claim.effect, t) in F_ranges}

    def meets(t, lo, hi):
        if t not in ranges:
            return False
        a, b = ranges[t]
        return a <= hi and (b is None or b >= lo)
    eff_df = int(rows["II"].df)
    err_df = int(anova.df_error)
    name = _effect_name(claim.effect)
    available = {t: r for t, r in rows.items() if r.F is not None and r.p is not None}
    checks: list[ReconcileCheck] = []

    # df1 ------------------------------------------------------------------
    if claim.df1 is not None:
        ok = abs(claim.df1 - eff_df) < 1e-9
        msg = (
            f"df1 = {_g(claim.df1)} matches the {eff_df} df of {name} in these data."
            if ok
            else f"df1 = {_g(claim.df1)} is reported, but {name} has {eff_df} df in these data: "
            f"the reported test is not of this effect in this design."
        )
        checks.append(ReconcileCheck(item="df1", ok=ok, severity="clear" if ok else "critical",
                                     expected=float(eff_df), found=float(claim.df1), message=msg))

    # df2 ------------------------------------------------------------------
    implied_n = None
    if claim.df2 is not None:
        implied_n = float(claim.df2 + n_cells)
        ok = abs(claim.df2 - err_df) < 1e-9
        if ok:
            msg = (f"df2 = {_g(claim.df2)} matches the error df N - m = {n_obs} - {n_cells} = {err_df}.")
        else:
            diff = implied_n - n_obs
            msg = (
                f"df2 = {_g(claim.df2)} implies N = {_g(implied_n)} observations (df2 + m = {_g(claim.df2)} + "
                f"{n_cells} cells), but the data have N = {n_obs}: {_g(abs(diff))} "
                f"{'more' if diff > 0 else 'fewer'} than the data (error df here {err_df})"
            )
            if not float(claim.df2).is_integer():
                msg += "; a fractional df2 points to a Welch-type or corrected test, not the classical F"
            elif diff < 0:
                msg += "; were observations excluded?"
            msg = msg.rstrip("?") + ("?" if msg.endswith("?") else ".")
        checks.append(ReconcileCheck(item="df2", ok=ok, severity="clear" if ok else "critical",
                                     expected=float(err_df), found=float(claim.df2), message=msg))

    # F --------------------------------------------------------------------
    reproducing: tuple[str, ...] = ()
    closest = None
    if available:
        if claim.F is not None:
            key = {t: abs(r.F - claim.F) for t, r in available.items()}
        elif claim.p is not None:
            key = {t: abs(r.p - claim.p) for t, r in available.items()}
        else:
            key = {t: 0.0 for t in available}
        best = min(available, key=lambda t: (key[t], SS_TYPES.index(t)))
        fb = available[best].F
        same = tuple(t for t in SS_TYPES if t in available and abs(available[t].F - fb) <= 1e-9 * max(1.0, abs(fb)))
        closest = ClosestMatch(ss_type=best, same_as=same, F=float(fb), p=float(available[best].p),
                               df1=eff_df, df2=err_df)

    if claim.F is not None:
        lo, hi = _F_interval(claim)
        if not available:
            checks.append(ReconcileCheck(
                item="F", ok=False, severity="minor", expected=None, found=(lo, hi),
                message=f"F for {name} cannot be recomputed from these data "
                        f"({rows['II'].note or 'no test can be formed'}), so the reported F cannot be checked."))
        else:
            slo, shi = _slack(lo, hi)
            reproducing = tuple(t for t, r in available.items() if slo <= r.F <= shi or meets(t, slo, shi))
            by_rounding = [t for t in reproducing if not slo <= available[t].F <= shi]
            coincide = len(closest.same_as) == len(available) == 3
            shown = _interval_text(lo, hi)
            if claim.F_relation != "=":
                shown = f"F {claim.F_relation} {_F_text(claim)} as stated"
            if reproducing:
                which = (f"{_types_text(reproducing)} (F = {available[reproducing[0]].F:.4f}"
                         + ("; with every cell filled they coincide for the interaction" if coincide and claim.effect == "AB"
                            else "; the three types coincide here" if coincide else "")
                         + ")")
                if by_rounding:
                    a, b = ranges[by_rounding[0]]
                    which += (f"{' only' if len(by_rounding) == len(reproducing) else ''} within the table's "
                              f"rounding (the printed cell statistics allow F from {a:.4f} to "
                              f"{'unbounded' if b is None else f'{b:.4f}'})")
                others = [t for t in available if t not in reproducing]
                msg = f"F {claim.F_relation} {_F_text(claim)} ({'rounding interval ' if claim.F_relation == '=' else ''}{shown}) is reproduced by {which}"
                if others:
                    msg += "; " + ", ".join(f"Type {t} gives {available[t].F:.4f}" for t in others)
                msg += "."
                ok = True
            else:
                msg = (f"F {claim.F_relation} {_F_text(claim)} ({'rounding interval ' if claim.F_relation == '=' else ''}{shown}) is reproduced by no SS type: "
                       + ", ".join(f"Type {t} gives {available[t].F:.4f}" for t in available)
                       + f"; the closest is {_types_text(closest.same_as)}")
                if ranges:
                    t0 = closest.ss_type if closest.ss_type in ranges else next(iter(ranges))
                    a, b = ranges[t0]
                    msg += (f"; even within the table's rounding the printed cell statistics allow only F from "
                            f"{a:.4f} to {'unbounded' if b is None else f'{b:.4f}'} (Type {t0})")
                msg += "."
                ok = False
            checks.append(ReconcileCheck(item="F", ok=ok, severity="clear" if ok else "critical",
                                         expected=float(closest.F), found=(lo, hi), message=msg))

    # p --------------------------------------------------------------------
    if claim.p is not None or claim.ns:
        found = _reported_p(claim, alpha)
        if claim.F is not None:
            d1 = claim.df1 if claim.df1 is not None else eff_df
            d2 = claim.df2 if claim.df2 is not None else err_df
            Flo, Fhi = _slack(*_F_interval(claim))
            Flo = max(Flo, 0.0)
            plo, phi = _p_sf(Fhi, d1, d2), _p_sf(Flo, d1, d2)
            ok = _p_consistent(claim, plo, phi, alpha)
            src = f"F({_g(d1)}, {_g(d2)}) {claim.F_relation} {_F_text(claim)}"
            msg = (f"The reported p ({_reported_p_text(claim)}) "
                   f"{'agrees' if ok else 'does not agree'} with {src}, which gives p in {_interval_text(plo, phi)} "
                   f"once F's rounding is carried through")
            if not ok and (d1 != eff_df or d2 != err_df):
                dlo, dhi = _p_sf(Fhi, eff_df, err_df), _p_sf(Flo, eff_df, err_df)
                if _p_consistent(claim, dlo, dhi, alpha):
                    msg += (f"; on the data's df ({eff_df}, {err_df}) it would agree (p in {_interval_text(dlo, dhi)}), "
                            f"so the reported df look wrong")
            msg += "."
            checks.append(ReconcileCheck(item="p", ok=ok, severity="clear" if ok else "critical",
                                         expected=(plo, phi), found=found, message=msg))
        elif available:
            def p_span(t, r):
                if t in ranges:
                    a, b = ranges[t]
                    return (0.0 if b is None else _p_sf(b, eff_df, err_df)), _p_sf(a, eff_df, err_df)
                return r.p, r.p

            agree = tuple(t for t, r in available.items() if _p_consistent(claim, *p_span(t, r), alpha))
            ok = bool(agree)
            ps = ", ".join(f"Type {t} p = {_pfmt(r.p)}" for t, r in available.items())
            msg = (f"The reported p ({_reported_p_text(claim)}) "
                   + (f"agrees with the data's p for {_types_text(agree)} ({ps})." if ok
                      else f"does not agree with the data's p for any SS type ({ps})."))
            checks.append(ReconcileCheck(item="p", ok=ok, severity="clear" if ok else "critical",
                                         expected=float(closest.p), found=found, message=msg))
        else:
            checks.append(ReconcileCheck(
                item="p", ok=False, severity="minor", expected=None, found=found,
                message=f"The p value of {name} cannot be recomputed from these data "
                        f"({rows['II'].note or 'no test can be formed'})."))

    # p-format -------------------------------------------------------------
    if claim.p is not None and claim.p_relation == "=" and claim.p == 0.0:
        d = max(claim.p_decimals or 0, 1)
        right = "p < ." + "0" * (d - 1) + "1"
        checks.append(ReconcileCheck(
            item="p-format", ok=False, severity="concern", expected=right, found=_reported_p_text(claim),
            message=f"{_reported_p_text(claim)} is a reporting error: a p value is never zero; it should read {right}."))

    serious = [c for c in checks if c.severity == "critical"]
    recomputable = [c for c in checks if c.item != "p-format" and c.severity != "minor"]
    if serious:
        reproduced = False
        msg = (f"The reported test of {name} cannot be reproduced from these data: "
               f"{', '.join(c.item for c in serious)} inconsistent")
        if closest is not None:
            msg += (f"; the closest match is {_types_text(closest.same_as)}, F({closest.df1}, {closest.df2}) = "
                    f"{closest.F:.4f}, p = {_pfmt(closest.p)}")
        if implied_n is not None and implied_n != n_obs:
            msg += f"; the reported df2 implies N = {_g(implied_n)} against {n_obs} in the data"
        msg += "."
    elif recomputable:
        reproduced = True
        msg = f"The reported test of {name} is reproduced by these data"
        if reproducing:
            msg += f" ({_types_text(reproducing)})"
        msg += "."
        if any(c.item == "p-format" for c in checks):
            msg = msg[:-1] + ", apart from the p = .000 reporting error."
    else:
        reproduced = None
        msg = f"The reported test of {name} cannot be checked: no test of it can be formed from these data."
    return Reconciliation(
        claim=claim,
        reproduced=reproduced,
        checks=tuple(checks),
        closest=closest,
        reproducing_types=reproducing,
        implied_n=implied_n,
        n_obs=n_obs,
        n_cells=n_cells,
        message=msg,
    )


def _reported_p_text(claim: Claim) -> str:
    if claim.p is None:
        return "ns"
    p = f"{claim.p:.{claim.p_decimals}f}" if claim.p_decimals is not None and claim.p_decimals <= 12 else f"{claim.p:g}"
    if p.startswith("0."):
        p = p[1:]
    return f"p {claim.p_relation} {p}"


def decision_of_claim(claim: Claim, alpha: float = 0.05) -> bool | None:
    """Whether the claim says the effect is significant at alpha.

    Parameters
    ----------
    claim : Claim
        A parsed claim.
    alpha : float, default 0.05
        Significance level.

    Returns
    -------
    bool or None
        True (significant: 'present', p < alpha, or a bound ``p < b`` with b <= alpha),
        False ('absent', 'ns', p >= alpha, or ``p > b`` with b >= alpha), None when the
        claim does not settle it at this alpha (``p < .10`` at alpha .05, or no p, F or
        word at all).  A claim with F and df but no p is read through p = P(F_df1,df2 > F).
    """
    if claim.kind == "present":
        return True
    if claim.kind == "absent" or (claim.ns and claim.p is None):
        return False
    if claim.p is not None:
        rel, p = claim.p_relation, claim.p
        if rel == "=":
            return p < alpha
        if rel == "<":
            return True if p <= alpha else None
        if rel == "<=":
            return True if p < alpha else None
        if rel == ">":
            return False if p >= alpha else None
        return False if p >= alpha else None  # '>='
    if claim.F is not None and claim.df1 is not None and claim.df2 is not None:
        p = _p_sf(claim.F, claim.df1, claim.df2)
        if claim.F_relation in ("<", "<="):
            return False if p >= alpha else None
        if claim.F_relation in (">", ">="):
            return True if p < alpha else None
        return p < alpha
    return None
