"""Assemble the verdict from the earlier stages' typed results.

:func:`judge` is the single entry point the API calls after the diagnostics
and methods have run.  It reads only typed values: each diagnostic's
``severity`` and ``facts``, each method's fields, the ANOVA, the size check.
It decides nothing itself beyond gathering: the trust rules are in
:mod:`.trust`, the verdict rules in :mod:`.conclude`.
"""

from __future__ import annotations

from dataclasses import dataclass

from ..decision import decision
from ..errors import OptionError
from ..facts import (FragilityFacts, HomogeneityFacts, IndependenceFacts, InfluenceFacts, OutlierFacts,
                     RoundingFacts, ScaleFacts)
from ..results import SEVERITIES
from .claim import Claim, parse_claim
from .conclude import EffectVerdict, Verdict, conclude, judge_effect
from .reconcile import Reconciliation, decision_of_claim, reconcile
from .sensitivity import DetectableEffect, EquivalenceResult, detectable_interaction, equivalence_test
from .trust import MethodTrust, Primary, adopt_primary, assess_trust, choose_primary

__all__ = ["ClaimRecord", "Judgement", "judge", "parse_claims", "parse_equivalence"]

_GRADED_FROM = SEVERITIES.index("concern")


@dataclass(frozen=True, kw_only=True)
class ClaimRecord:
    """What is claimed about one effect, and whether the data reproduce it.

    Attributes
    ----------
    effect : str
    source : str
        'stated' (given by the user) or 'classical-f' (no claim was stated:
        the classical F's decision at alpha stands in for it).
    claim : Claim or None
        The parsed claim (None for 'classical-f').
    present : bool or None
        What the claim says about the effect at alpha.
    reconciliation : Reconciliation or None
        For a reported test.
    """

    effect: str
    source: str
    claim: Claim | None
    present: bool | None
    reconciliation: Reconciliation | None

    def to_dict(self) -> dict:
        return {"effect": self.effect, "source": self.source,
                "text": self.claim.text if self.claim else None,
                "parsed": self.claim.to_dict() if self.claim else None,
                "present": self.present,
                "reproduced": self.reconciliation.reproduced if self.reconciliation else None,
                "reconciliation": self.reconciliation.to_dict() if self.reconciliation else None}


@dataclass(frozen=True, kw_only=True)
class Judgement:
    """Everything the verdict stage produced.

    Attributes
    ----------
    verdict : Verdict
    claims : tuple of ClaimRecord
        The interaction's first.
    trust : tuple of MethodTrust
        One per method result, in the methods' order.
    agrees : tuple of (bool or None)
        Per method result: does its decision agree with the claim about its
        effect (None when its effect has no claim or it gave no p).
    sensitivity : DetectableEffect or None
        The smallest interaction the design detects with 80% power.
    equivalence : EquivalenceResult or None
        With an equivalence bound.
    """

    verdict: Verdict
    claims: tuple[ClaimRecord, ...]
    trust: tuple[MethodTrust, ...]
    agrees: tuple
    sensitivity: DetectableEffect | None
    equivalence: EquivalenceResult | None
    primary: Primary | None = None


def _names(factors) -> dict:
    a, b = factors
    out = {a: "A", b: "B"}
    for sep in (":", "*", " x ", "x", " X ", "\u00d7", " by "):
        out[f"{a}{sep}{b}"] = "AB"
        out[f"{b}{sep}{a}"] = "AB"
    return out


def parse_claims(texts, *, factors) -> tuple[Claim, ...]:
    """Parse the claims given on the command line or to the API.

    Parameters
    ----------
    texts : str or sequence of str or Claim
    factors : (str, str)
        Factor names, accepted as effect labels (``"dose: F(2, 54) = ..."``).
    """
    if texts is None:
        return ()
    if isinstance(texts, (str, Claim)):
        texts = (texts,)
    out = []
    seen = set()
    for t in texts:
        c = t if isinstance(t, Claim) else parse_claim(t, names=_names(factors))
        if c.effect in seen:
            raise OptionError(f"claim: expected at most one claim per effect, found two for {c.effect} "
                              f"({c.text!r}); give one claim for each effect")
        seen.add(c.effect)
        out.append(c)
    return tuple(out)


def parse_equivalence(bound) -> dict | None:
    """Read an equivalence bound: a number (RMS interaction term, response units)
    or ``eta2=X`` (partial eta squared).

    Parameters
    ----------
    bound : None, float or str
    """
    if bound is None:
        return None
    text = str(bound).strip()
    key = "bound_rms"
    if text.lower().startswith(("eta2=", "eta_sq=", "partial_eta_sq=")):
        key, text = "bound_eta_sq", text.split("=", 1)[1]
    try:
        v = float(text)
    except ValueError:
        raise OptionError(f"equivalence: expected a positive number (the largest negligible RMS interaction "
                          f"term, in response units) or eta2=X, found {bound!r}; e.g. --equivalence 0.5 or "
                          "--equivalence eta2=0.02") from None
    if not (v > 0) or (key == "bound_eta_sq" and v >= 1):
        raise OptionError(f"equivalence: expected a bound above 0 (below 1 for eta2), found {bound!r}")
    return {key: v}


def _facts(diagnostics, kind):
    for d in diagnostics:
        if isinstance(getattr(d, "facts", None), kind):
            return d.facts
    return None


def judge(fit, *, diagnostics=(), methods=(), claims=(), calibration=None, equivalence=None) -> Judgement:
    """Judge whether the claims (or the classical decision) hold up.

    Parameters
    ----------
    fit : Fit
    diagnostics : sequence of Diagnostic
    methods : sequence of MethodResult
    claims : sequence of Claim
        Parsed claims (:func:`parse_claims`); an unstated interaction claim
        is the classical F's decision.
    calibration : Calibration, optional
        The size check.
    equivalence : dict, optional
        From :func:`parse_equivalence`.
    """
    alpha = fit.alpha
    an = fit.anova
    cells = fit.cells
    homog = _facts(diagnostics, HomogeneityFacts)
    indep = _facts(diagnostics, IndependenceFacts)
    frag = _facts(diagnostics, FragilityFacts)
    infl = _facts(diagnostics, InfluenceFacts)
    scale = _facts(diagnostics, ScaleFacts)
    rounding = _facts(diagnostics, RoundingFacts)
    trust = assess_trust(methods, counts=cells.counts, alpha=alpha, homogeneity=homog, independence=indep,
                         calibration=calibration)
    outl = _facts(diagnostics, OutlierFacts)
    primary = choose_primary(methods, trust, alpha=alpha, calibration=calibration, homogeneity=homog)
    trust = adopt_primary(methods, trust, primary, alpha=alpha)

    by_effect = {c.effect: c for c in claims}
    records: list[ClaimRecord] = []
    for eff in ("AB", "A", "B"):
        c = by_effect.get(eff)
        if c is None:
            if eff != "AB":
                continue
            p = an.tables["II"].row("AB").p
            records.append(ClaimRecord(effect="AB", source="classical-f", claim=None, present=decision(p, alpha),
                                       reconciliation=None))
            continue
        rec = reconcile(c, anova=an, n_obs=int(cells.N), n_cells=int(cells.m), alpha=alpha,
                        F_ranges=rounding.F_ranges if rounding is not None else None) if c.has_test else None
        records.append(ClaimRecord(effect=eff, source="stated", claim=c, present=decision_of_claim(c, alpha),
                                   reconciliation=rec))

    sens = None
    try:
        sens = detectable_interaction(an, alpha=alpha, power=0.8, effect="AB")
    except Exception:  # pragma: no cover - the function reports problems as notes
        sens = None
    eq = None
    ab_row = an.tables["II"].row("AB")
    if equivalence:
        eq = equivalence_test(ab_row.F, ab_row.df, an.df_error, n_obs=int(cells.N), ms_error=an.ms_error,
                              alpha=alpha, **equivalence)

    graded = tuple((d.id, d.severity, d.summary) for d in diagnostics
                   if d.severity in SEVERITIES and SEVERITIES.index(d.severity) >= _GRADED_FROM)
    cannot = None
    if an.df_error == 0 and not any(m.id == "tukey-one-df" and m.p is not None for m in methods):
        cannot = ("there is no within-cell error (one observation per cell) and Tukey's one-degree-of-freedom "
                  "test could not be formed, so no test of the interaction exists here")
    if an.df_interaction == 0:
        cannot = "the interaction has no degrees of freedom in this design (too many empty cells)"

    effects: list[EffectVerdict] = []
    for rec in records:
        sensitivity = None
        if rec.effect == "AB" and sens is not None and sens.partial_eta_sq is not None:
            rms = f" (an RMS interaction term of {sens.rms_term:.3g} response units)" if sens.rms_term else ""
            sensitivity = _Sens(eta2_80=sens.partial_eta_sq,
                                text=f"low sensitivity: the design detects an interaction only from partial eta "
                                     f"squared {sens.partial_eta_sq:.3f}{rms} with 80% power, so a smaller one "
                                     "could be missed")
            if eq is not None and eq.equivalent:
                sensitivity = None
        ev = judge_effect(rec.effect, claim_present=rec.present, claim_source=rec.source, methods=methods,
                          trust=trust, alpha=alpha, reconciliation=rec.reconciliation,
                          fragility=frag if rec.effect == "AB" else None,
                          influence=infl if rec.effect == "AB" else None,
                          scale=scale if rec.effect == "AB" else None,
                          rounding=rounding if rec.effect == "AB" else None,
                          graded=graded if rec.effect == "AB" else (),
                          sensitivity=sensitivity, cannot_reason=cannot if rec.effect == "AB" else None,
                          primary=primary if rec.effect == "AB" else None,
                          outliers=outl if rec.effect == "AB" else None, n_obs=int(cells.N))
        effects.append(ev)
    verdict = conclude(tuple(effects))

    present = {r.effect: r.present for r in records}
    agrees = tuple(None if (m.p is None or present.get(m.effect) is None)
                   else decision(m.p, alpha) == present[m.effect] for m in methods)
    return Judgement(verdict=verdict, claims=tuple(records), trust=trust, agrees=agrees, sensitivity=sens,
                     equivalence=eq, primary=primary)


@dataclass(frozen=True)
class _Sens:
    eta2_80: float
    text: str
