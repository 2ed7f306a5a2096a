"""Result types shared by the diagnostics and the alternative methods.

Frozen, keyword-only dataclasses with fixed field names that never change with
options.  ``values`` / ``extra`` dictionaries hold only JSON-serialisable
numbers, strings, lists and dicts (or None), never NaN: a missing number is
None with a reason in ``summary`` or ``notes``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

__all__ = ["SEVERITIES", "NOT_RUN", "Diagnostic", "MethodResult", "json_float"]

def json_float(x) -> float | None:
    """A JSON-safe float for ``values`` / ``extra``: None for None, NaN or inf."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


#: the project's grade words, mildest first: "clear" (no problem worth stating), "minor" (a small
#: or uncertain problem, worth knowing), "concern" (large enough to weigh on the interaction test),
#: "critical" (the interaction test cannot be read at face value).  Colour is never the only carrier.
SEVERITIES = ("clear", "minor", "concern", "critical")

#: the state of a check that could not be run on this input (e.g. it needs the raw observations
#: and only cell summaries were given): not a grade, never weighed like a finding
NOT_RUN = "not-run"


@dataclass(frozen=True, kw_only=True)
class Diagnostic:
    """One graded finding about an assumption or the design.

    Attributes
    ----------
    id : str
        Stable identifier ('normality', 'homogeneity', ...).
    severity : str
        One of :data:`SEVERITIES`, or :data:`NOT_RUN` when the check could not
        be run on this input (the summary says why).
    summary : str
        One plain sentence naming the consequence for the interaction test.
    values : dict
        The numbers behind it (JSON-serialisable; None, never NaN).
    facts : object or None
        The typed payload later stages read (a type from :mod:`audit.facts`);
        not part of the JSON.
    """

    id: str
    severity: str
    summary: str
    values: dict = field(default_factory=dict)
    facts: object = field(default=None, compare=False, repr=False)

    def __post_init__(self) -> None:
        if self.severity not in SEVERITIES and self.severity != NOT_RUN:
            raise ValueError(f"severity must be one of {SEVERITIES} or {NOT_RUN!r}, found {self.severity!r}")

    def to_dict(self) -> dict:
        return {"id": self.id, "severity": self.severity, "summary": self.summary, "values": self.values}


@dataclass(frozen=True, kw_only=True)
class MethodResult:
    """One test of one effect by one method.

    Attributes
    ----------
    id : str
        Method id ('classical-f', 'welch-james', ...).
    effect : str
        'A', 'B' or 'AB'.
    statistic : float or None
        The test statistic (F-type unless ``statistic_name`` says otherwise).
    statistic_name : str
        'F', 'T/c', 't^2', ... : what ``statistic`` is.
    df1, df2 : float or None
        Reference-distribution degrees of freedom (df2 None for chi-square or
        resampling references).
    p : float or None
        None only with a reason in ``notes`` (a degenerate design).
    resamples : int or None
        B for resampling methods.
    mc_se : float or None
        Monte Carlo standard error of p (resampling methods).
    p_interval : tuple of float or None
        99% Clopper-Pearson interval for the resampled p.
    valid_for_interaction : bool
        False for methods known not to test the interaction validly (rank
        transform), whatever the data.
    notes : tuple of str
        Plain statements: reasons for None, self-checks, cautions.
    extra : dict
        Method-specific numbers (JSON-serialisable).
    """

    id: str
    effect: str
    statistic: float | None
    statistic_name: str = "F"
    df1: float | None = None
    df2: float | None = None
    p: float | None = None
    resamples: int | None = None
    mc_se: float | None = None
    p_interval: tuple[float, float] | None = None
    valid_for_interaction: bool = True
    notes: tuple[str, ...] = ()
    extra: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {
            "id": self.id,
            "effect": self.effect,
            "statistic": self.statistic,
            "statistic_name": self.statistic_name,
            "df1": self.df1,
            "df2": self.df2,
            "p": self.p,
            "resamples": self.resamples,
            "mc_se": self.mc_se,
            "p_interval": list(self.p_interval) if self.p_interval else None,
            "valid_for_interaction": self.valid_for_interaction,
            "notes": list(self.notes),
            "extra": self.extra,
        }
