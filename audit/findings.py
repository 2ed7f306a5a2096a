"""The findings type: everything an audit found, in one frozen object.

``Findings.to_dict()`` gives the stable JSON structure (keys ``design``,
``cells``, ``anova``, ``interaction_terms``, ``diagnostics``, ``methods``,
``fragility``, ``cautions``, ``provenance``); later stages (verdict, review
mode) add keys, never rename them.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np

from .core import AnovaResult
from .design import CellStats, DesignSummary
from .results import NOT_RUN, Diagnostic, MethodResult

__all__ = ["Findings", "CAUTIONS", "to_jsonable", "SCHEMA_VERSION", "findings_schema"]

#: version of the findings JSON layout (raised whenever a key changes meaning or is removed)
SCHEMA_VERSION = "3.0"

#: shown with every report (an automated audit can mislead if read alone)
CAUTIONS = (
    "An automated audit supports a statistician's judgement; it does not replace it.",
    "Independence of observations cannot be checked from the data: it rests on how the "
    "experiment was run (randomisation, one measurement per experimental unit).",
    "Clinical and regulatory analyses follow their own guidelines (for example ICH E9) and "
    "pre-specified analysis plans, whatever this audit says.",
)


def findings_schema() -> dict:
    """The published JSON Schema of the findings JSON (``schema_version`` :data:`SCHEMA_VERSION`)."""
    from importlib import resources

    return json.loads(resources.files("audit").joinpath("schema/findings.schema.json").read_text("utf-8"))


def to_jsonable(x):
    """Convert numpy scalars/arrays and tuples to plain JSON types.

    A non-finite float (NaN, inf, -inf) becomes None, never a string: the JSON
    promises a number or null.  The code that produced such a value is
    responsible for the note saying why it is missing (this function is the
    last safety net, not the place where reasons are given)."""
    if isinstance(x, dict):
        return {str(k): to_jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [to_jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return to_jsonable(x.tolist())
    if isinstance(x, (np.bool_, bool)):
        return bool(x)
    if isinstance(x, (np.integer,)):
        return int(x)
    if isinstance(x, (np.floating, float)):
        v = float(x)
        return v if math.isfinite(v) else None
    return x


@dataclass(frozen=True, kw_only=True)
class Findings:
    """Result of :func:`audit.check` / :func:`audit.check_summary`.

    Attributes
    ----------
    mode : str
        'data' (raw observations) or 'summary' (cell table only).
    alpha : float
    response : str
    factors : tuple of str
    design : DesignSummary
    cells : CellStats
    anova : AnovaResult
    diagnostics : tuple of Diagnostic
    methods : tuple of MethodResult
    fragility : dict or None
        {'deletions_to_flip', 'rows'} in data mode.
    cautions : tuple of str
    provenance : dict
        Tool and library versions, input SHA-256, timestamp, resamples, seed.
    figure_data : dict or None
        Plot coordinates for the report figures (not part of the JSON).
    """

    mode: str
    alpha: float
    response: str
    factors: tuple[str, str]
    design: DesignSummary
    cells: CellStats
    anova: AnovaResult
    diagnostics: tuple[Diagnostic, ...] = ()
    methods: tuple[MethodResult, ...] = ()
    fragility: dict | None = None
    cautions: tuple[str, ...] = CAUTIONS
    provenance: dict = field(default_factory=dict)
    figure_data: dict | None = field(default=None, repr=False, compare=False)
    judgement: object = None
    calibration: object = None
    summary_input: dict | None = None

    def not_run(self) -> list[dict]:
        """The checks and methods that were not run on this input, each with its
        reason: in summary mode, what the raw observations would add."""
        out = [{"id": d.id, "kind": "diagnostic", "reason": d.summary} for d in self.diagnostics
               if d.severity == NOT_RUN]
        seen = set()
        for m in self.methods:
            if m.p is None and m.id not in seen and any("raw observations" in t for t in m.notes):
                seen.add(m.id)
                out.append({"id": m.id, "kind": "method", "reason": m.notes[0]})
        if self.mode == "summary" and self.methods:
            from .methods import RESAMPLING_IDS

            for mid in RESAMPLING_IDS:
                out.append({"id": mid, "kind": "method",
                            "reason": "not computed: resampling needs the raw observations (only cell summaries "
                                      "were given)"})
        return out

    @property
    def verdict(self) -> str | None:
        """The overall verdict ('holds', ..., 'cannot-judge'), or None when not judged."""
        return self.judgement.verdict.verdict if self.judgement is not None else None

    @property
    def reasons(self) -> tuple:
        """The verdict's reasons, most important first."""
        return self.judgement.verdict.reasons if self.judgement is not None else ()

    def exit_status(self, *, strict: bool = False) -> int:
        """The command's exit status for this verdict (0 holds, 1 does not, 3 cannot judge).

        Parameters
        ----------
        strict : bool
            Caveats exit 1 too.
        """
        from .verdict.conclude import exit_status

        if self.judgement is None:
            return 0
        overall = exit_status(self.verdict, strict=strict)
        # a claimed main effect that is not reproducible, does not hold or is fragile fails the
        # command too (as it fails a declared audit under the default fail_on): a CI step whose
        # only claims are main effects must not pass on the interaction's verdict alone
        if overall == 0 and any(exit_status(e.verdict, strict=strict) == 1
                                for e in self.judgement.verdict.effects[1:]):
            return 1
        return overall

    def diagnostic(self, id: str) -> Diagnostic:
        """The diagnostic with this id (a KeyError lists the valid ids)."""
        for d in self.diagnostics:
            if d.id == id:
                return d
        raise KeyError(f"no diagnostic {id!r}; the diagnostics are: {', '.join(d.id for d in self.diagnostics)}")

    def method(self, id: str, effect: str = "AB") -> MethodResult:
        """The result of method ``id`` for ``effect`` (a KeyError lists the valid ids)."""
        for m in self.methods:
            if m.id == id and m.effect == effect:
                return m
        ids = list(dict.fromkeys(m.id for m in self.methods))
        raise KeyError(f"no method {id!r} for effect {effect!r}; the methods are: {', '.join(ids)}; "
                       "effects: A, B, AB")

    def _method_dicts(self) -> list[dict]:
        out = []
        j = self.judgement
        for i, m in enumerate(self.methods):
            d = m.to_dict()
            if j is not None:
                t = j.trust[i]
                d["trusted"] = t.trusted
                d["trust_reason"] = t.reason
                d["trust_rule"] = t.rule
                d["agrees_with_claim"] = j.agrees[i]
            else:
                d["trusted"] = None
                d["trust_reason"] = None
                d["trust_rule"] = None
                d["agrees_with_claim"] = None
            out.append(d)
        return out

    def _claim_dict(self) -> dict | None:
        j = self.judgement
        if j is None:
            return None
        return j.claims[0].to_dict()

    def cell_table(self) -> list[dict]:
        c = self.cells
        sd = c.sd                      # formed on standardised values: no overflow
        out = []
        for j, la in enumerate(c.levels_a):
            for k, lb in enumerate(c.levels_b):
                n = int(c.counts[j, k])
                out.append({
                    "a": la, "b": lb, "n": n,
                    "mean": float(c.display_means[j, k]) if n else None,
                    "sd": float(sd[j, k]) if n > 1 else None,
                })
        return out

    def interaction_table(self) -> list[dict]:
        c, an = self.cells, self.anova
        out = []
        for j, la in enumerate(c.levels_a):
            for k, lb in enumerate(c.levels_b):
                if c.counts[j, k] == 0:
                    continue
                out.append({
                    "a": la, "b": lb,
                    "mean": float(c.display_means[j, k]),
                    "additive_fit": float(an.additive_fit[j, k] + c.offset),
                    "term": float(an.interaction_terms[j, k]),
                })
        return out

    def to_dict(self) -> dict:
        j = self.judgement
        d = {
            "schema_version": SCHEMA_VERSION,
            "verdict": self.verdict,
            "reasons": [r.to_dict() for r in self.reasons],
            "effect_verdicts": [e.to_dict() for e in j.verdict.effects] if j is not None else [],
            "claim": self._claim_dict(),
            "claims": [c.to_dict() for c in j.claims] if j is not None else [],
            "sensitivity": j.sensitivity.to_dict() if j is not None and j.sensitivity is not None else None,
            "equivalence": j.equivalence.to_dict() if j is not None and j.equivalence is not None else None,
            "primary": (j.primary.to_dict() if j is not None and getattr(j, "primary", None) is not None else None),
            "calibration": self.calibration.to_dict() if self.calibration is not None else None,
            "mode": self.mode,
            "alpha": self.alpha,
            "response": self.response,
            "factors": list(self.factors),
            "design": self.design.to_dict(),
            "cells": self.cell_table(),
            "anova": self.anova.to_dict(),
            "interaction_terms": self.interaction_table(),
            "diagnostics": [x.to_dict() for x in self.diagnostics],
            "methods": self._method_dicts(),
            "fragility": self.fragility,
            "not_run": self.not_run(),
            "summary_input": self.summary_input,
            "cautions": list(self.cautions),
            "provenance": self.provenance,
        }
        return to_jsonable(d)

    def to_json(self, *, indent: int | None = 2) -> str:
        return json.dumps(self.to_dict(), indent=indent, allow_nan=False, ensure_ascii=False)

    # -- reports (laid out from the report model, audit.report) --------------------------------------

    def to_text(self) -> str:
        """The full text report (the content of ``report.txt``)."""
        from .render.text import render_text

        return render_text(self)

    def to_markdown(self) -> str:
        """The Markdown report (``report.md``); figures are not linked (they are not written)."""
        from .render.markdown import render_markdown
        from .report import build_report

        return render_markdown(build_report(self))

    def to_html(self) -> str:
        """The self-contained HTML report (``report.html``); figures embedded when the audit
        was run with ``figures=True``."""
        from .report.files import html_with_figures

        return html_with_figures(self)

    def _repr_html_(self) -> str:
        """Notebooks show the HTML report (without drawing figures: call to_html() for them)."""
        from .render.html import render_html
        from .report import build_report

        return render_html(build_report(self))

    #: the columns of :meth:`to_frame`, in order (fixed, whatever the options)
    FRAME_COLUMNS = ("method", "effect", "statistic_name", "statistic", "df1", "df2", "p", "resamples",
                     "partial_eta_sq", "trusted", "trust_reason", "agrees_with_claim")

    def to_frame(self):
        """A tidy pandas table of the methods: one row per method and effect.

        Columns (:attr:`FRAME_COLUMNS`): method, effect ('AB', 'A', 'B'), statistic_name,
        statistic, df1, df2, p, resamples, partial_eta_sq (where the method gives one,
        else missing), trusted, trust_reason, agrees_with_claim (missing without a verdict
        or a claim about that effect).
        """
        import pandas as pd

        rows = []
        for d in self._method_dicts():
            eta = (d.get("extra") or {}).get("partial_eta_sq")
            rows.append({
                "method": d["id"], "effect": d["effect"], "statistic_name": d["statistic_name"],
                "statistic": d["statistic"], "df1": d["df1"], "df2": d["df2"], "p": d["p"],
                "resamples": d["resamples"], "partial_eta_sq": eta, "trusted": d["trusted"],
                "trust_reason": d["trust_reason"], "agrees_with_claim": d["agrees_with_claim"],
            })
        frame = pd.DataFrame(rows, columns=list(self.FRAME_COLUMNS))
        for c in ("statistic", "df1", "df2", "p", "partial_eta_sq"):
            frame[c] = pd.to_numeric(frame[c], errors="coerce").astype("float64")
        frame["resamples"] = frame["resamples"].astype("Int64")
        for c in ("trusted", "agrees_with_claim"):
            frame[c] = frame[c].astype("boolean")
        return frame
