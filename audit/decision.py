"""The one decision rule used by every stage: an effect is significant at alpha
when its p-value is strictly below alpha.

Every module that turns a p-value into a yes/no (diagnostics that ask whether
a deletion or a transformation flips the interaction, the trust rules, the
verdict) calls :func:`decision`, so the same p and alpha give the same answer
everywhere.  A p-value that could not be computed gives ``None`` (no decision),
never a guess.
"""

from __future__ import annotations

import math

__all__ = ["decision", "decisions", "near_alpha", "settled"]

#: a p-value within this factor of alpha (either side) is "near alpha": the
#: decision would change under a modest change of data or method (our choice)
NEAR_ALPHA_FACTOR = 2.0


def decision(p: float | None, alpha: float) -> bool | None:
    """True when ``p < alpha`` (significant), False when not, None when p is missing.

    Parameters
    ----------
    p : float or None
        The p-value (None or NaN when it could not be computed).
    alpha : float
        The significance level.
    """
    if p is None:
        return None
    p = float(p)
    if math.isnan(p):
        return None
    return p < alpha


def decisions(p, alpha: float):
    """Vectorised :func:`decision`: a boolean array, True where ``p < alpha``
    (NaN, a p that could not be computed, gives False: no significant decision).

    Parameters
    ----------
    p : array_like of float
    alpha : float
    """
    import numpy as np

    a = np.asarray(p, dtype=float)
    with np.errstate(invalid="ignore"):
        return np.where(np.isnan(a), False, a < alpha)


def near_alpha(p: float | None, alpha: float) -> bool:
    """True when p lies within a factor :data:`NEAR_ALPHA_FACTOR` of alpha.

    Parameters
    ----------
    p : float or None
    alpha : float
    """
    if p is None or math.isnan(float(p)):
        return False
    return alpha / NEAR_ALPHA_FACTOR <= float(p) < alpha * NEAR_ALPHA_FACTOR


def settled(interval, alpha: float) -> bool:
    """A resampled p-value's decision is settled when its whole Monte Carlo
    interval gives the same :func:`decision` (no interval: settled).

    Parameters
    ----------
    interval : (float, float) or None
    alpha : float
    """
    if interval is None:
        return True
    lo, hi = interval
    return decision(lo, alpha) == decision(hi, alpha)
