"""Typed payloads: the facts a diagnostic hands to later stages.

A :class:`~audit.results.Diagnostic` carries its numbers twice: ``values`` (a
JSON dictionary for people and files) and ``facts`` (one of the frozen types
below, for code).  Later stages (the trust rules and the verdict) read only
``facts`` and ``severity``, never ``values`` keys, so a diagnostic can reword
or extend its JSON without breaking the verdict, and a missing fact is a type
error at the source instead of a silent ``None`` downstream.
"""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = [
    "HomogeneityFacts",
    "FragilityFacts",
    "RoundingFacts",
    "InfluenceFacts",
    "ScaleFacts",
    "ShapeFacts",
    "IndependenceFacts",
    "NormalityFacts",
    "OutlierFacts",
    "BalanceFacts",
]


@dataclass(frozen=True, kw_only=True)
class HomogeneityFacts:
    """Spread across cells.

    Attributes
    ----------
    sd_ratio : float or None
        Largest over smallest cell SD (cells with n >= 2).
    n_ratio : float or None
        Largest over smallest cell size.
    unequal_variances : bool
        The spread differs beyond what equal variances give with these cell
        sizes (or a cell has zero spread beside cells that do not).
    pairing : str
        'negative' (large variances in small cells: the classical F is
        liberal), 'positive' (large variances in large cells: conservative)
        or 'none'.
    distorts_classical : bool
        The unequal variances are large enough, given how they pair with the
        cell sizes, to move the classical F's level well away from alpha
        (graded warning or serious).
    """

    sd_ratio: float | None
    n_ratio: float | None
    unequal_variances: bool
    pairing: str
    distorts_classical: bool


@dataclass(frozen=True, kw_only=True)
class NormalityFacts:
    """Shape of the residual distribution.

    Attributes
    ----------
    size_band : str or None
        'small', 'moderate', 'large' or 'extreme' departure (None if not run).
    """

    size_band: str | None


@dataclass(frozen=True, kw_only=True)
class BalanceFacts:
    """Cell sizes.

    Attributes
    ----------
    min_n : int
        Smallest size of a filled cell.
    empty_cells : int
    single_cells : int
        Cells holding one observation.
    """

    min_n: int
    empty_cells: int
    single_cells: int


@dataclass(frozen=True, kw_only=True)
class OutlierFacts:
    """Observations beyond the outlier cut-off.

    Attributes
    ----------
    rows : tuple of int
        Their row labels.
    """

    rows: tuple


@dataclass(frozen=True, kw_only=True)
class InfluenceFacts:
    """Leave-one-out results for the interaction.

    Attributes
    ----------
    flipping_rows : tuple of int
        Rows whose single deletion flips the interaction decision at alpha.
    p_min, p_max : float or None
        Range of the leave-one-out interaction p-values.
    """

    flipping_rows: tuple
    p_min: float | None
    p_max: float | None


@dataclass(frozen=True, kw_only=True)
class FragilityFacts:
    """Greedy deletions that flip the interaction decision.

    Attributes
    ----------
    deletions_to_flip : int or None
        How many deletions flip it (None: not flipped within ``max_steps``,
        or not run).
    rows : tuple of int
        The rows deleted, in order.
    max_steps : int
    significant_before : bool or None
        The interaction decision on all the data.
    stopped : str
        Why the search ended: 'flipped', 'cap reached' or 'no testable
        deletion left'.
    """

    deletions_to_flip: int | None
    rows: tuple
    max_steps: int
    significant_before: bool | None
    stopped: str = ""


@dataclass(frozen=True, kw_only=True)
class RoundingFacts:
    """The interaction test over every table that rounds to the reported one
    (summary mode: the counterpart of fragility).

    Attributes
    ----------
    decision_can_change : bool
        The decision at alpha differs between the ends of the p range.
    F_min, F_max : float or None
        Range of the interaction F (F_max None: unbounded).
    p_min, p_max : float
        Range of its p.
    significant : bool or None
        The decision on the table as printed.
    F_ranges : dict
        {(effect, SS type): (F_min, F_max or None)} for every test the ANOVA
        forms: the F values a reported test may have while the table rounds
        to what is printed (read by the reconciliation).
    """

    decision_can_change: bool
    F_min: float | None
    F_max: float | None
    p_min: float
    p_max: float
    significant: bool | None
    F_ranges: dict = field(default_factory=dict)


@dataclass(frozen=True, kw_only=True)
class ShapeFacts:
    """Form of the interaction.

    Attributes
    ----------
    shape : str
        'ordinal', 'crossover', 'crossover within noise' or 'none' (not
        significant or not judged).
    """

    shape: str


@dataclass(frozen=True, kw_only=True)
class ScaleFacts:
    """The interaction test after transformations of the response.

    Attributes
    ----------
    removable : bool
        Significant on the raw scale but not at some Box-Cox lambda inside
        the 95% profile interval.
    lambda_hat : float or None
    log_p, boxcox_p : float or None
        Interaction p after log and after the Box-Cox lambda-hat.
    """

    removable: bool
    lambda_hat: float | None
    log_p: float | None
    boxcox_p: float | None


@dataclass(frozen=True, kw_only=True)
class IndependenceFacts:
    """What the data say about independence.

    Attributes
    ----------
    checked : bool
        A run-order or unit column was given.
    pseudo_replication : bool
        An experimental unit was observed more than once.
    serial_dependence : bool
        Run order shows dependence (runs test or lag-1 correlation).
    """

    checked: bool
    pseudo_replication: bool
    serial_dependence: bool
