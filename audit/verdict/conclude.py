"""The verdict: does the claimed interaction conclusion hold up on these data?

This module is the only place that decides.  It weighs, for the interaction
(and for each main effect that a claim names):

* the claim: stated (a reported test, ``present`` / ``absent``) or, without
  one, the classical F's decision at alpha;
* whether a reported test can be reproduced from the data (reconciliation);
* the methods the trust rules keep (:mod:`audit.verdict.trust`): untrusted
  methods do not vote, and a split among trusted methods is itself a finding;
* fragility and influence (a handful of deletions flip the decision; in summary
  mode, the decision can change within the table's rounding), scale
  dependence (a removable interaction), graded problems, closeness to alpha,
  and, for an "absent" claim, the design's sensitivity.

Primary test (the interaction)
------------------------------
The verdict on the interaction follows one method's decision: the primary test
(:func:`audit.verdict.trust.choose_primary`), the most powerful size-checked
method that keeps its size on data shaped like these, chosen from the design and
the size check only, never from the observed p-values.  Other trusted methods
support or dissent: a dissent is *material* (the verdict is ``fragile``) when the
dissenting method is of comparable simulated power (at least the primary's minus
``COMPARABLE_POWER``); a conservative method's non-rejection never vetoes a
rejection; other dissents are caveats naming the method.  Deletions count only
when they move the decision against the claim: an outlier among them, or a
decision that a quarter or more of the single deletions reverse
(``UNSTABLE_SHARE``), is ``fragile``; a borderline few is a caveat with the count
and the rows.  Without a primary (no method qualifies) every trusted method
votes as below and a single trusted method cannot decide alone.  Main effects
are judged by the vote below.  Measured on ``benchmarks/study_verdict.py``
(README "How often is the verdict right?").

Verdicts (exactly one per effect; the overall verdict is the interaction's):

=====================  ====================================================
holds                  the primary (for main effects: every trusted method)
                       agrees with the claim; not fragile; no caveat
holds-with-caveats     agrees, with stated caveats (near alpha, removable,
                       a warning-level problem, few trusted methods, low
                       sensitivity for an "absent" claim, a resampled
                       decision not settled)
fragile                a material dissent, an outlier that carries the
                       decision, an unstable decision, the decision can
                       change within a summary table's rounding (main
                       effects: the trusted methods split around alpha, or
                       one or two deletions flip the decision)
does-not-hold          the primary (main effects: every trusted method)
                       contradicts the claim
not-reproducible       the reported test cannot be reproduced from the data
cannot-judge           no trusted test of the effect (no error df and no
                       Tukey test, too little data, dependent observations)
=====================  ====================================================

Exit status of ``check``: 0 for holds and holds-with-caveats (1 with
``--strict`` for caveats), 1 for fragile, does-not-hold and not-reproducible,
3 for cannot-judge (2 is kept for usage and input errors).

Caution: the verdict supports a statistician's judgement and does not replace
it; independence of observations cannot be checked from the data.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from ..decision import decision, near_alpha, settled
from ..report.format import p_text  # formatting only: no statistic, no decision
from .trust import COMPARABLE_POWER, PRIMARY_ORDER  # power within COMPARABLE_POWER of the primary's: comparable

__all__ = ["VERDICTS", "Reason", "EffectVerdict", "Verdict", "conclude", "exit_status",
           "FRAGILE_DELETIONS", "LOW_SENSITIVITY_ETA2"]

VERDICTS = ("holds", "holds-with-caveats", "fragile", "does-not-hold", "not-reproducible", "cannot-judge")

#: this many deletions or fewer that flip the decision make it fragile (our
#: choice, matching the fragility check's "critical" grade for a significant effect)
FRAGILE_DELETIONS = 2

#: an "absent" claim is weakly supported when the design cannot detect a
#: partial eta squared of this size with 80% power (Cohen 1988's "medium" f =
#: 0.25, i.e. eta^2 = 0.0588; from memory)
LOW_SENSITIVITY_ETA2 = 0.0588

#: fewer trusted methods than this for an effect is itself a caveat (our choice)
MIN_TRUSTED = 2

#: a decision that this share of the single deletions (or more) moves against the claim is unstable:
#: fragile even without an anomalous observation (our choice; benchmarks/study_verdict.py)
UNSTABLE_SHARE = 0.25


_EXIT = {"holds": 0, "holds-with-caveats": 0, "fragile": 1, "does-not-hold": 1, "not-reproducible": 1,
         "cannot-judge": 3}

_EFFECT_WORD = {"AB": "interaction", "A": "main effect of A", "B": "main effect of B"}


@dataclass(frozen=True, kw_only=True)
class Reason:
    """One reason behind a verdict.

    Attributes
    ----------
    text : str
        One plain sentence.
    ref : str
        The finding behind it: 'diagnostic:<id>', 'method:<id>',
        'calibration:<id>', 'claim:<item>' or 'sensitivity'.
    weight : str
        'decisive' (it set the verdict), 'caveat' or 'support'.
    """

    text: str
    ref: str
    weight: str

    def to_dict(self) -> dict:
        return {"text": self.text, "ref": self.ref, "weight": self.weight}


@dataclass(frozen=True, kw_only=True)
class EffectVerdict:
    """The verdict on one effect.

    Attributes
    ----------
    effect : str
        'AB', 'A' or 'B'.
    verdict : str
        One of :data:`VERDICTS`.
    claim_present : bool or None
        What the claim says (True: the effect is present).
    claim_source : str
        'stated' or 'classical-f'.
    trusted_methods : tuple of str
    agreeing, disagreeing, unsettled : tuple of str
        Trusted methods whose decision agrees / disagrees with the claim /
        is not settled at this number of resamples.
    reasons : tuple of Reason
        Ranked, most important first.
    """

    effect: str
    verdict: str
    claim_present: bool | None
    claim_source: str
    trusted_methods: tuple[str, ...]
    agreeing: tuple[str, ...]
    disagreeing: tuple[str, ...]
    unsettled: tuple[str, ...]
    reasons: tuple[Reason, ...]

    def to_dict(self) -> dict:
        return {"effect": self.effect, "verdict": self.verdict, "claim_present": self.claim_present,
                "claim_source": self.claim_source, "trusted_methods": list(self.trusted_methods),
                "agreeing": list(self.agreeing), "disagreeing": list(self.disagreeing),
                "unsettled": list(self.unsettled), "reasons": [r.to_dict() for r in self.reasons]}


@dataclass(frozen=True, kw_only=True)
class Verdict:
    """The overall verdict (the interaction's) and each judged effect's.

    Attributes
    ----------
    verdict : str
    reasons : tuple of Reason
    effects : tuple of EffectVerdict
        The interaction first, then any main effect a claim named.
    """

    verdict: str
    reasons: tuple[Reason, ...]
    effects: tuple[EffectVerdict, ...] = field(default=())

    def effect(self, effect: str) -> EffectVerdict:
        for e in self.effects:
            if e.effect == effect:
                return e
        raise KeyError(f"no verdict for effect {effect!r}; judged: {', '.join(e.effect for e in self.effects)}")


def exit_status(verdict: str, *, strict: bool = False) -> int:
    """Exit status of ``check`` for a verdict.

    Parameters
    ----------
    verdict : str
    strict : bool
        Caveats exit 1 too.
    """
    if strict and verdict == "holds-with-caveats":
        return 1
    return _EXIT[verdict]


def _settled(m, alpha: float) -> bool:
    """A resampled p is settled when its Monte Carlo interval lies on one side of alpha, or when
    the sequential rule stopped it early (its decision then has resampling risk <= 0.001)."""
    return bool((m.extra or {}).get("stopped_early")) or settled(m.p_interval, alpha)


def _present_word(present: bool) -> str:
    return "present" if present else "absent"


#: the removable-interaction caveat (the scale check found a transformation that removes it)
_REMOVABLE = ("the interaction is removable: it is not significant after a transformation the data support "
              "(Box-Cox), so it may reflect the measurement scale")


def _rounding_reason(rounding, word: str, alpha: float) -> Reason:
    """The decisive reason when a summary table's rounding can change the decision."""
    hi = "unbounded" if rounding.F_max is None else f"{rounding.F_max:.4g}"
    return Reason(text=f"moving every reported mean and SD within half a unit of its last digit gives an "
                       f"interaction F from {rounding.F_min:.4g} to {hi} (p from {rounding.p_min:.3g} to "
                       f"{rounding.p_max:.3g}): the {word} decision at alpha {alpha:g} can change within the "
                       "table's rounding", ref="diagnostic:rounding", weight="decisive")


def judge_effect(effect: str, *, claim_present: bool | None, claim_source: str, methods, trust, alpha: float,
                 reconciliation=None, fragility=None, influence=None, scale=None, graded=(), rounding=None,
                 sensitivity=None, cannot_reason: str | None = None, primary=None, outliers=None,
                 n_obs: int | None = None) -> EffectVerdict:
    """Judge one effect (see the module docstring for the rules).

    Parameters
    ----------
    effect : str
    claim_present : bool or None
        None when there is no claim and no classical decision.
    claim_source : str
    methods : sequence of MethodResult
        Every method result (other effects are ignored).
    trust : sequence of MethodTrust
        Same order as ``methods``.
    alpha : float
    reconciliation : object, optional
        ``.reproduced`` (bool or None) and ``.checks`` (items with ``ok``,
        ``item`` and ``message``).
    fragility : FragilityFacts, optional (interaction only)
    influence : InfluenceFacts, optional (interaction only)
    scale : ScaleFacts, optional (interaction only)
    rounding : RoundingFacts, optional (interaction only, summary mode)
        A decision that can change within the table's rounding is fragile.
    graded : sequence of (id, severity, summary)
        Diagnostics graded warning or serious, as caveats.
    sensitivity : object, optional
        For an "absent" claim: ``.eta2_80`` (smallest partial eta squared
        detectable with 80% power) and ``.text``.
    cannot_reason : str, optional
        A reason that no test can be judged at all.
    primary : Primary, optional
        The primary test (:func:`audit.verdict.trust.choose_primary`): the verdict follows its
        decision (see "Primary test" in the module docstring); None: every trusted method votes.
    outliers : OutlierFacts, optional
        Rows flagged as outliers (an anomalous observation that carries the decision).
    n_obs : int, optional
        Number of observations (the share of single deletions that flip the decision).
    """
    reasons: list[Reason] = []
    word = _EFFECT_WORD[effect]
    pairs = [(m, t) for m, t in zip(methods, trust) if m.effect == effect]
    trusted = [(m, t) for m, t in pairs if t.trusted]
    tnames = tuple(m.id for m, _ in trusted)

    def out(verdict: str, agreeing=(), disagreeing=(), unsettled=()) -> EffectVerdict:
        early = [f"{m.id} ({m.resamples} of {m.extra.get('max_resamples')})" for m, _t in trusted
                 if m.extra.get("stopped_early") and m.id in (*agreeing, *disagreeing)]
        if early:   # a decision from a sequential early stop is stated, never a caveat
            reasons.append(Reason(text="decided by sequential stopping at alpha (probability at most 0.001 that "
                                       "all resamples would reverse it): " + ", ".join(early),
                                  ref=f"method:{early[0].split(' ')[0]}", weight="support"))
        return EffectVerdict(effect=effect, verdict=verdict, claim_present=claim_present,
                             claim_source=claim_source, trusted_methods=tnames, agreeing=tuple(agreeing),
                             disagreeing=tuple(disagreeing), unsettled=tuple(unsettled), reasons=tuple(reasons))

    # 1. the reported numbers must be reproducible before anything else counts
    if reconciliation is not None and reconciliation.reproduced is False:
        for c in reconciliation.checks:
            if not c.ok and getattr(c, "severity", "critical") != "minor":
                reasons.append(Reason(text=c.message, ref=f"claim:{c.item}", weight="decisive"))
        if not reasons:
            reasons.append(Reason(text="the reported test cannot be reproduced from the data", ref="claim",
                                  weight="decisive"))
        return out("not-reproducible")
    if reconciliation is not None:
        for c in reconciliation.checks:
            if not c.ok:
                reasons.append(Reason(text=c.message, ref=f"claim:{c.item}", weight="caveat"))

    if cannot_reason:
        reasons.insert(0, Reason(text=cannot_reason, ref="design", weight="decisive"))
        return out("cannot-judge")
    if claim_present is None:
        reasons.insert(0, Reason(text=f"there is no claim about the {word} and the classical F could not be "
                                      "formed", ref="method:classical-f", weight="decisive"))
        return out("cannot-judge")
    if not trusted:
        why = "; ".join(f"{m.id}: {t.reason}" for m, t in pairs[:4])
        reasons.insert(0, Reason(text=f"no method can be trusted to test the {word} on these data"
                                      + (f" ({why})" if why else ""), ref="trust", weight="decisive"))
        return out("cannot-judge")

    agree, disagree, unsettled = [], [], []
    for m, _t in trusted:
        if not _settled(m, alpha):
            unsettled.append(m.id)
            continue
        d = decision(m.p, alpha)
        (agree if d == claim_present else disagree).append(m.id)
    pm = {m.id: (m.p, m.resamples) for m, _ in trusted}

    def listing(ids) -> str:
        return ", ".join(f"{i} ({p_text(*pm[i])})" for i in ids)

    claim_txt = f"the claim that the {word} is {_present_word(claim_present)}"
    if claim_source == "classical-f":
        claim_txt += " (the classical F's decision; no claim was stated)"

    if primary is not None:
        prim = next((m for m, _t in trusted if m.id == primary.method), None)
        if prim is not None:
            return _judge_primary(prim, primary, trusted=trusted, pairs=pairs, agree=agree, disagree=disagree,
                                  unsettled=unsettled, claim_present=claim_present, claim_txt=claim_txt,
                                  word=word, alpha=alpha, reasons=reasons, out=out, listing=listing,
                                  fragility=fragility, influence=influence, scale=scale, rounding=rounding,
                                  graded=graded, sensitivity=sensitivity, outliers=outliers, n_obs=n_obs,
                                  effect=effect)
        if len(trusted) < MIN_TRUSTED:
            m0, t0 = trusted[0]
            cov = primary.power_of(m0.id) is not None
            what = ("its simulated size is too far above alpha for it to decide alone" if cov else
                    "it is not covered by the size check, so it cannot decide alone")
            reasons.insert(0, Reason(text=f"only {m0.id} is trusted to test the {word} here, and {what} "
                                          f"({primary.reason})", ref=f"method:{m0.id}", weight="decisive"))
            return out("cannot-judge")
        reasons.append(Reason(text=f"no primary test: {primary.reason}; every trusted method votes",
                              ref="trust", weight="caveat"))

    if not agree and not disagree:
        reasons.insert(0, Reason(text=f"every trusted method's resampled p is too close to alpha {alpha:g} to "
                                      f"settle the decision at this number of resamples ({', '.join(unsettled)})",
                                 ref=f"method:{unsettled[0]}", weight="decisive"))
        return out("fragile", agree, disagree, unsettled)
    if disagree and agree:
        reasons.insert(0, Reason(text=f"the trusted methods split around alpha {alpha:g}: {listing(agree)} "
                                      f"agree with {claim_txt}; {listing(disagree)} do not",
                                 ref=f"method:{disagree[0]}", weight="decisive"))
        return out("fragile", agree, disagree, unsettled)
    if disagree:
        reasons.insert(0, Reason(text=f"every trusted method contradicts {claim_txt}: {listing(disagree)}",
                                 ref=f"method:{disagree[0]}", weight="decisive"))
        untrusted_agree = [m.id for m, t in pairs if not t.trusted and m.p is not None
                           and decision(m.p, alpha) == claim_present]
        for m, t in pairs:
            if m.id in untrusted_agree:
                reasons.append(Reason(text=f"{m.id} ({p_text(m.p, m.resamples)}) agrees with the claim but is not trusted "
                                           f"here: {t.reason}", ref=f"method:{m.id}", weight="support"))
        return out("does-not-hold", agree, disagree, unsettled)

    # every settled trusted method agrees: look for fragility, then caveats
    verdict = "holds"
    # deleting rows to *create* significance is easier than to remove it, so an "absent" claim is
    # fragile only when a single deletion flips it (matching the fragility check's grades)
    limit = FRAGILE_DELETIONS if claim_present else 1
    if fragility is not None and fragility.deletions_to_flip is not None \
            and fragility.deletions_to_flip <= limit:
        rows = ", ".join(str(r) for r in fragility.rows[:fragility.deletions_to_flip])
        reasons.append(Reason(text=f"deleting {fragility.deletions_to_flip} observation(s) (row {rows}) flips "
                                   f"the {word} decision at alpha {alpha:g}", ref="diagnostic:fragility",
                              weight="decisive"))
        verdict = "fragile"
    elif influence is not None and influence.flipping_rows and claim_present:
        rows = ", ".join(str(r) for r in influence.flipping_rows[:5])
        reasons.append(Reason(text=f"deleting a single observation (row {rows}) flips the {word} decision",
                              ref="diagnostic:influence", weight="decisive"))
        verdict = "fragile"
    elif rounding is not None and rounding.decision_can_change:
        reasons.append(_rounding_reason(rounding, word, alpha))
        verdict = "fragile"
    if verdict == "fragile":
        reasons.append(Reason(text=f"the trusted methods agree with {claim_txt} on all the data: {listing(agree)}",
                              ref=f"method:{agree[0]}", weight="support"))
        return out("fragile", agree, disagree, unsettled)

    caveats: list[Reason] = []
    if scale is not None and scale.removable and claim_present:
        caveats.append(Reason(text=_REMOVABLE + " rather than a substantive interaction", ref="diagnostic:scale",
                                   weight="caveat"))
    near = [i for i in agree if near_alpha(pm[i][0], alpha)]
    if near:
        caveats.append(Reason(text=f"close to alpha {alpha:g}: {listing(near)}", ref=f"method:{near[0]}",
                              weight="caveat"))
    if unsettled:
        caveats.append(Reason(text=f"not settled at this number of resamples: {', '.join(unsettled)}",
                              ref=f"method:{unsettled[0]}", weight="caveat"))
    if fragility is not None and fragility.deletions_to_flip is not None and fragility.deletions_to_flip <= 5:
        caveats.append(Reason(text=f"deleting {fragility.deletions_to_flip} observations flips the {word} "
                                   f"decision", ref="diagnostic:fragility", weight="caveat"))
    if len(trusted) < MIN_TRUSTED:
        caveats.append(Reason(text=f"only one method can be trusted here ({trusted[0][0].id})", ref="trust",
                              weight="caveat"))
    if not claim_present and sensitivity is not None and getattr(sensitivity, "eta2_80", None) is not None \
            and sensitivity.eta2_80 > LOW_SENSITIVITY_ETA2:
        caveats.append(Reason(text=sensitivity.text, ref="sensitivity", weight="caveat"))
    conservative = [t.method for _m, t in trusted if t.conservative]
    if conservative and not claim_present:
        caveats.append(Reason(text=f"conservative here, so a non-significant result is weak evidence of "
                                   f"absence: {', '.join(conservative)}", ref=f"calibration:{conservative[0]}",
                              weight="caveat"))
    for did, sev, summ in graded:
        if did in ("fragility", "influence", "scale", "rounding") and effect == "AB":
            continue  # weighed above
        caveats.append(Reason(text=f"{did} graded {sev}: {summ}", ref=f"diagnostic:{did}", weight="caveat"))
    lead = Reason(text=f"every trusted method agrees with {claim_txt}: {listing(agree)}",
                  ref=f"method:{agree[0]}", weight="decisive")
    reasons.insert(0, lead)
    reasons.extend(caveats)
    return out("holds-with-caveats" if caveats or reconciliation_caveat(reasons) else "holds",
               agree, disagree, unsettled)


def _judge_primary(prim, primary, *, trusted, pairs, agree, disagree, unsettled, claim_present, claim_txt, word,
                   alpha, reasons, out, listing, fragility, influence, scale, rounding, graded, sensitivity,
                   outliers, n_obs, effect) -> EffectVerdict:
    """The verdict follows the primary test's decision; other trusted methods support or dissent."""
    level = primary.level if primary.level is not None else alpha
    d = decision(prim.p, level)
    agrees = d == claim_present
    ptxt = p_text(prim.p, prim.resamples) + (f", decided at p < {level:.3g}" if level < alpha else "")
    why = Reason(text=f"primary test {primary.reason}", ref=f"method:{prim.id}", weight="support")
    pw = primary.power
    material, minor = [], []
    for m, t in trusted:
        if m.id == prim.id or m.id in unsettled:
            continue
        if decision(m.p, alpha) == d:
            continue
        other = primary.power_of(m.id)
        if t.conservative and d:
            minor.append((m, "conservative here, so its non-rejection cannot veto a rejection"))
        elif primary.basis == "fixed-order" and m.id in PRIMARY_ORDER \
                and not t.conservative:
            material.append((m, "trusted; no size check ran to compare powers"))
        elif other is not None and pw is not None and other >= pw - COMPARABLE_POWER:
            material.append((m, f"trusted, simulated power {100 * other:.0f}% against the primary's {100 * pw:.0f}%"))
        elif other is not None and pw is not None:
            minor.append((m, f"less powerful here (simulated power {100 * other:.0f}% against the primary's "
                             f"{100 * pw:.0f}%)"))
        else:
            minor.append((m, "not covered by the size check, so it supports or dissents but does not decide"))
    supporters = [m.id for m, _t in trusted if m.id != prim.id and m.id not in unsettled and decision(m.p, alpha) == d]

    def dtxt(lst):
        return "; ".join(f"{m.id} ({p_text(m.p, m.resamples)}: {why_})" for m, why_ in lst)

    sidew = "rejects" if d else "does not reject"
    if material:
        m0 = material[0][0]
        side = "agrees" if agrees else "contradicts"
        reasons.insert(0, Reason(text=f"a trusted method of comparable power decides the other way: the primary "
                                      f"{prim.id} ({ptxt}) {side} with {claim_txt}, but {dtxt(material)} does not",
                                 ref=f"method:{m0.id}", weight="decisive"))
        reasons.append(why)
        return out("fragile", agree, disagree, unsettled)
    if not agrees:
        reasons.insert(0, Reason(text=f"the primary test contradicts {claim_txt}: {prim.id} ({ptxt})"
                                      + (f"; supported by {listing(supporters)}" if supporters else ""),
                                 ref=f"method:{prim.id}", weight="decisive"))
        reasons.append(why)
        if minor:
            reasons.append(Reason(text=f"agreeing with the claim, but not decisive: {dtxt(minor)}",
                                  ref=f"method:{minor[0][0].id}", weight="support"))
        if scale is not None and scale.removable and not claim_present:
            reasons.append(Reason(text=_REMOVABLE, ref="diagnostic:scale", weight="caveat"))
        return out("does-not-hold", agree, disagree, unsettled)

    # the primary agrees with the claim: is the decision carried by an anomalous observation, unstable, or
    # within the table's rounding?
    verdict = "holds"
    caveats: list[Reason] = []
    on_f = prim.id == "classical-f" and level >= alpha   # the deletion checks test the classical F at alpha
    f_agrees = any(m.id == "classical-f" and m.id not in unsettled and decision(m.p, alpha) == claim_present
                   for m, _t in trusted)
    flagged = set(outliers.rows) if outliers is not None else set()
    k = fragility.deletions_to_flip if fragility is not None else None
    if k is not None and fragility.significant_before is not None and fragility.significant_before != claim_present:
        k = None   # the classical F's deletions would move it toward the claim: not a fragility of the claim
    limit = FRAGILE_DELETIONS if claim_present else 1
    rows_k = tuple(fragility.rows[:k]) if k is not None else ()
    anomalous = sorted(flagged.intersection(rows_k)) if k is not None and k <= limit else []
    flips = tuple(influence.flipping_rows) if influence is not None and on_f else ()
    share = len(flips) / n_obs if n_obs else 0.0
    if anomalous and f_agrees:
        reasons.append(Reason(text=f"an anomalous observation carries the {word} decision: deleting {k} "
                                   f"observation(s) (row {', '.join(map(str, rows_k))}) moves the classical F "
                                   f"against the claim at alpha {alpha:g}, and row {', '.join(map(str, anomalous))} "
                                   "is flagged as an outlier", ref="diagnostic:fragility", weight="decisive"))
        verdict = "fragile"
    elif on_f and k is not None and k <= limit and share >= UNSTABLE_SHARE:
        reasons.append(Reason(text=f"the {word} decision is unstable: deleting {k} observation(s) (row "
                                   f"{', '.join(map(str, rows_k))}) moves the primary classical F against the claim "
                                   f"at alpha {alpha:g}, and so does deleting any one of {len(flips)} of the {n_obs} "
                                   f"observations", ref="diagnostic:fragility", weight="decisive"))
        verdict = "fragile"
    elif rounding is not None and rounding.decision_can_change:
        reasons.append(_rounding_reason(rounding, word, alpha))
        verdict = "fragile"
    elif on_f and k is not None and k <= 5:
        caveats.append(Reason(text=f"borderline: deleting {k} observation(s) (row {', '.join(map(str, rows_k))}) "
                                   f"moves the primary classical F against the claim at alpha {alpha:g}; none of them "
                                   "is flagged as an outlier", ref="diagnostic:fragility", weight="caveat"))
    if verdict == "fragile":
        reasons.append(Reason(text=f"the primary {prim.id} ({ptxt}) agrees with {claim_txt} on all the data"
                                   + (f", as do {listing(supporters)}" if supporters else ""),
                              ref=f"method:{prim.id}", weight="support"))
        reasons.append(why)
        return out("fragile", agree, disagree, unsettled)

    if scale is not None and scale.removable and claim_present:
        caveats.append(Reason(text=_REMOVABLE + " rather than a substantive interaction", ref="diagnostic:scale",
                                   weight="caveat"))
    if near_alpha(prim.p, level):
        caveats.append(Reason(text=f"close to its level {level:.3g}: the primary {prim.id} ({ptxt})",
                              ref=f"method:{prim.id}", weight="caveat"))
    if minor:
        caveats.append(Reason(text=f"decides the other way, but not decisive: {dtxt(minor)}",
                              ref=f"method:{minor[0][0].id}", weight="caveat"))
    if unsettled:
        caveats.append(Reason(text=f"not settled at this number of resamples: {', '.join(unsettled)}",
                              ref=f"method:{unsettled[0]}", weight="caveat"))
    if len(trusted) < MIN_TRUSTED:
        caveats.append(Reason(text=f"only one method can be trusted here ({prim.id})", ref="trust", weight="caveat"))
    if not claim_present and sensitivity is not None and getattr(sensitivity, "eta2_80", None) is not None \
            and sensitivity.eta2_80 > LOW_SENSITIVITY_ETA2:
        caveats.append(Reason(text=sensitivity.text, ref="sensitivity", weight="caveat"))
    t_prim = next(t for m, t in trusted if m.id == prim.id)
    if t_prim.conservative and not claim_present:
        caveats.append(Reason(text=f"the primary {prim.id} is conservative here, so a non-significant result is weak "
                                   "evidence of absence", ref=f"calibration:{prim.id}", weight="caveat"))
    for did, sev, summ in graded:
        if did in ("fragility", "influence", "scale", "rounding") and effect == "AB":
            continue  # weighed above
        caveats.append(Reason(text=f"{did} graded {sev}: {summ}", ref=f"diagnostic:{did}", weight="caveat"))
    lead = Reason(text=f"the primary test agrees with {claim_txt}: {prim.id} ({ptxt}, {sidew} at alpha {alpha:g})"
                       + (f"; supported by {listing(supporters)}" if supporters else ""),
                  ref=f"method:{prim.id}", weight="decisive")
    reasons.insert(0, lead)
    reasons.append(why)
    reasons.extend(caveats)
    return out("holds-with-caveats" if caveats or reconciliation_caveat(reasons) else "holds",
               agree, disagree, unsettled)


def reconciliation_caveat(reasons) -> bool:
    return any(r.ref.startswith("claim:") and r.weight == "caveat" for r in reasons)


def conclude(effects: tuple[EffectVerdict, ...]) -> Verdict:
    """The overall verdict is the interaction's; its reasons lead.

    Parameters
    ----------
    effects : tuple of EffectVerdict
        The interaction's first.
    """
    ab = effects[0]
    reasons = list(ab.reasons)
    if ab.claim_present and ab.verdict in ("holds", "holds-with-caveats") and len(effects) > 1:
        reasons.append(Reason(text="with an interaction present, each main effect averages over an effect that "
                                   "changes across the other factor's levels; read main effects with that in mind",
                              ref="method:classical-f", weight="caveat"))
    return Verdict(verdict=ab.verdict, reasons=tuple(reasons), effects=effects)
