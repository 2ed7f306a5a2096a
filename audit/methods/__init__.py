"""Stage 4b of the flow: alternative tests of the interaction (and main effects).

One module per method family, each a pure function of a :class:`~audit.fit.Fit`
returning :class:`~audit.results.MethodResult` objects:

========================== ============================= ==========================
id                         module                        needs
========================== ============================= ==========================
classical-f                classical.py                  cell statistics
welch-james                welch.py                      cell statistics
welch-james-trimmed        welch.py                      raw data
hc3-wald, hc4-wald         hc.py                         cell statistics
rank-transform             ranks.py                      raw data
aligned-rank-transform     ranks.py                      raw data
permutation-freedman-lane  permutation.py                raw data
permutation-ter-braak      permutation.py                raw data
permutation-studentized    permutation.py                raw data
wild-bootstrap             bootstrap.py                  raw data
tukey-one-df               tukey.py                      one observation per cell
additive-f                 classical.py                  one observation per cell
========================== ============================= ==========================

:func:`run_methods` runs them all in this order; a method that cannot run on
the data returns its result with ``p=None`` and the reason in ``notes``.
"""

from __future__ import annotations

import secrets

from ..errors import OptionError
from ..fit import Fit
from ..results import MethodResult

__all__ = ["run_methods", "METHOD_IDS", "RESAMPLING_IDS"]

METHOD_IDS = (
    "classical-f", "welch-james", "welch-james-trimmed", "hc3-wald", "hc4-wald",
    "rank-transform", "aligned-rank-transform", "permutation-freedman-lane",
    "permutation-ter-braak", "permutation-studentized", "wild-bootstrap", "tukey-one-df",
    "additive-f",
)
RESAMPLING_IDS = ("permutation-freedman-lane", "permutation-ter-braak", "permutation-studentized",
                  "wild-bootstrap")


def new_seed() -> int:
    """A fresh seed, recorded in the findings so the run can be repeated."""
    return secrets.randbelow(2**31)


def run_methods(fit: Fit, *, resamples: int = 9999, seed: int | None = None, progress=None,
                exact_resamples: bool = False) -> tuple[MethodResult, ...]:
    """Run every method on ``fit`` (interaction and main effects).

    Parameters
    ----------
    fit : Fit
    resamples : int, default 9999
        B, the largest number of resamples for each resampling method; 0 skips them.
    seed : int, optional
        Seed for the resampling methods (same seed, same numbers).  Each
        resampling method uses this seed; the three permutation methods share
        one permutation draw (:func:`~audit.methods.permutation.permutation_all`,
        the same numbers as separate runs with this seed).
    exact_resamples : bool, default False
        False: sequential stopping - each resampling method stops as soon as the
        decision of each effect at alpha is settled (Gandy 2009, resampling risk
        :data:`~audit.methods.resampling.SEQUENTIAL_RISK`); True: all B.
    progress : bool or callable, optional
        Passed to the resampling engine (a terminal bar when True).
    """
    from .bootstrap import wild_bootstrap_all
    from .classical import additive_f_all, classical_f_all
    from .hc import hc_wald_all
    from .permutation import permutation_all
    from .ranks import aligned_rank_transform_all, rank_transform_all
    from .tukey import tukey_one_df
    from .welch import welch_james_all, welch_james_trimmed_all

    if isinstance(resamples, bool) or not isinstance(resamples, int) or resamples < 0:
        raise OptionError(f"resamples: expected a whole number >= 0, found {resamples!r}; try 9999")
    out: list[MethodResult] = []
    out += classical_f_all(fit)
    out += welch_james_all(fit)
    out += welch_james_trimmed_all(fit)
    out += hc_wald_all(fit, kind="hc3")
    out += hc_wald_all(fit, kind="hc4")
    out += rank_transform_all(fit)
    out += aligned_rank_transform_all(fit)
    if resamples > 0:
        seed = new_seed() if seed is None else seed
        for res in permutation_all(fit, resamples=resamples, seed=seed, progress=progress,
                                   exact_resamples=exact_resamples):
            out += res
        out += wild_bootstrap_all(fit, resamples=resamples, seed=seed, progress=progress,
                                  exact_resamples=exact_resamples)
    if fit.anova.df_error == 0:
        out.append(tukey_one_df(fit, effect="AB"))
        out += additive_f_all(fit)
    return tuple(out)
