"""Option checks, run once at the edge (the start of :func:`audit.api.check` and
:func:`audit.api.check_summary`) before any data is read.

Each check returns the normalised value or raises
:class:`~audit.errors.OptionError` naming the option, what was expected, what
was found and a value to try.
"""

from __future__ import annotations

import numbers

from .errors import OptionError

__all__ = ["MAX_RESAMPLES", "MAX_SEED", "check_alpha", "check_resamples", "check_seed"]

#: Largest number of resamples per resampling method (larger runs take hours
#: and their Monte Carlo error is already far below any reported digit).
MAX_RESAMPLES = 1_000_000

#: Seeds are integers 0 <= seed < MAX_SEED (they fit a signed 64-bit integer).
MAX_SEED = 2**63


def _whole(value) -> int | None:
    """``value`` as an int when it is a whole number (not a bool), else None."""
    if isinstance(value, bool):
        return None
    if isinstance(value, numbers.Integral):
        return int(value)
    return None


def check_alpha(alpha) -> float:
    """The significance level as a float strictly between 0 and 1."""
    if isinstance(alpha, bool):
        raise OptionError(f"alpha: expected a number between 0 and 1, found {alpha!r}; try 0.05")
    try:
        a = float(alpha)
    except (TypeError, ValueError):
        raise OptionError(f"alpha: expected a number between 0 and 1, found {alpha!r}; try 0.05") from None
    if not (0.0 < a < 1.0):
        raise OptionError(f"alpha: expected a number strictly between 0 and 1, found {alpha!r}; try 0.05")
    return a


def check_resamples(resamples) -> int:
    """Resamples per resampling method: a whole number 0 <= B <= MAX_RESAMPLES (0 skips them)."""
    B = _whole(resamples)
    if B is None or B < 0:
        raise OptionError(f"resamples: expected a whole number from 0 to {MAX_RESAMPLES:,}, "
                          f"found {resamples!r}; try 9999 (or 0 to skip the resampling methods)")
    if B > MAX_RESAMPLES:
        raise OptionError(f"resamples: at most {MAX_RESAMPLES:,} resamples per method are allowed, "
                          f"found {resamples!r}; try 9999 (or 99999 for more precise p-values)")
    return B


def check_seed(seed) -> int | None:
    """The resampling seed: None (draw a fresh one) or a whole number 0 <= seed < 2**63."""
    if seed is None:
        return None
    s = _whole(seed)
    if s is None or not (0 <= s < MAX_SEED):
        raise OptionError(f"seed: expected a whole number from 0 to 2**63 - 1 (or no seed), "
                          f"found {seed!r}; try 12345")
    return s
