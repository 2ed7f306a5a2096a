"""Assertions for a project's own tests: guard an analysis the way tests guard code.

    from audit.testing import assert_interaction_holds, assert_no_interaction

    def test_rise_height_interaction():
        assert_interaction_holds("data/rise_height.csv", response="rise_mm",
                                 factors=("starter", "proof_temp"), claim="F(2, 42) = 31.80, p < .001")

    def test_no_flour_by_time_interaction():
        assert_no_interaction("data/crumb_acidity.csv", response="crumb_ph", factors=("flour", "ferment"))

Each runs :func:`audit.check` and raises ``AssertionError`` whose message is
the verdict and its reasons when the verdict is not 'holds' (or, with
``allow_caveats``, 'holds-with-caveats'); on success it returns the Findings.
The seed defaults to 0 and the timestamp is left out, so a test gives the same
result on every run.
"""

from __future__ import annotations

__all__ = ["assert_interaction_holds", "assert_no_interaction"]

#: seed used when the caller gives none (tests must not depend on a fresh draw)
DEFAULT_SEED = 0


def _message(findings, claim) -> str:
    said = ", ".join(map(repr, claim)) if isinstance(claim, (list, tuple)) else repr(claim)
    lines = [f"the interaction claim {said} does not hold: verdict {findings.verdict}"]
    lines += [f"  - [{r.weight}] {r.text} ({r.ref})" for r in findings.reasons]
    seed = findings.provenance.get("seed")
    lines.append(f"  (twoway-audit, seed {seed}; an automated audit supports a statistician's judgement)")
    return "\n".join(lines)


def _assert(data, *, response, factors, claim, allow_caveats, check_kwargs):
    from .api import check

    check_kwargs.setdefault("seed", DEFAULT_SEED)
    check_kwargs.setdefault("timestamp", False)
    if check_kwargs.get("methods") is False:
        raise TypeError("methods=False leaves the audit without a verdict; drop it")
    findings = check(data, response=response, factors=factors, claim=claim, **check_kwargs)
    ok = {"holds", "holds-with-caveats"} if allow_caveats else {"holds"}
    if findings.verdict not in ok:
        raise AssertionError(_message(findings, claim))
    return findings


def assert_interaction_holds(data, *, response, factors, claim=None, allow_caveats=True, **check_kwargs):
    """Assert that the interaction conclusion holds up on ``data``.

    Parameters
    ----------
    data : str, path or pandas.DataFrame
        As in :func:`audit.check`.
    response : str
    factors : (str, str)
    claim : str or sequence of str, optional
        The reported result(s) to judge (a test line such as
        ``"F(2, 54) = 4.11, p = .022"``, possibly one per effect); default
        ``"present"``: the interaction exists.
    allow_caveats : bool, default True
        Accept 'holds-with-caveats' as well as 'holds'.
    check_kwargs : keyword arguments
        Any other option of :func:`audit.check` (``seed`` defaults to 0,
        ``timestamp`` to False).

    Returns
    -------
    Findings

    Raises
    ------
    AssertionError
        The verdict and its reasons, when the claim does not hold.
    """
    return _assert(data, response=response, factors=factors, claim="present" if claim is None else claim,
                   allow_caveats=allow_caveats, check_kwargs=check_kwargs)


def assert_no_interaction(data, *, response, factors, allow_caveats=True, **check_kwargs):
    """Assert that the claim "no interaction" (``'absent'``) holds up on ``data``.

    Parameters
    ----------
    data : str, path or pandas.DataFrame
    response : str
    factors : (str, str)
    allow_caveats : bool, default True
        Accept 'holds-with-caveats' (for an absent claim often the design's
        low sensitivity) as well as 'holds'.
    check_kwargs : keyword arguments
        Any other option of :func:`audit.check` except ``claim``.

    Returns
    -------
    Findings

    Raises
    ------
    AssertionError
        The verdict and its reasons, when the claim does not hold.
    """
    if "claim" in check_kwargs:
        raise TypeError("assert_no_interaction judges the claim 'absent'; use assert_interaction_holds(claim=...) "
                        "for another claim")
    return _assert(data, response=response, factors=factors, claim="absent", allow_caveats=allow_caveats,
                   check_kwargs=check_kwargs)
