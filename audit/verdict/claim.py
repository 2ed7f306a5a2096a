"""Parse a reported claim about one effect of a two-way ANOVA.

A claim is what a manuscript or an analyst says about an effect: a reported
test line (``F(2, 54) = 4.11, p = .022``), a p-value alone (``p < .05``), the
abbreviation ``ns``, or one of the words ``present`` / ``absent``.  An optional
label in front names the effect (``AB:``, ``A:``, ``B:``; unlabelled means the
interaction).  The parser keeps the reported precision (digits after the
decimal point) because reconciliation works with rounding intervals
(METHODS.md section 9).

Accepted forms (spaces optional, case-insensitive):

- ``F(2, 54) = 4.11, p = .022``; ``F[2, 54]``, ``F (2; 54)``, ``F(2, 54) < 1``
- ``p = .022``, ``p < .05``, ``p <= .05``, ``p > .10``, ``p = .000``, ``p = 2.3e-4``
- ``ns``, ``n.s.``, ``not significant`` (the effect is claimed absent at the claim's
  level); after a test line (``F(2, 54) = 1.20, ns``) they stand in for the p part
- ``present`` / ``absent``; ``significant`` is read as present
- a trailing effect size or MSE (``, partial eta^2 = .13``, ``, MSE = 13.2``) is ignored
- unicode minus and dashes, ``≤``/``≥``, non-breaking spaces, ``*`` / ``_`` emphasis
  marks and a final full stop are normalised away

Untrusted text is bounded before and after parsing: a claim longer than
:data:`MAX_CLAIM_CHARS` is refused before any regular expression sees it; every
number must have at most :data:`MAX_SIGNIFICANT_DIGITS` significant digits and lie
in the float range (no overflow to infinity, no nonzero value that underflows to 0
or below the smallest normal float); F and the df must be finite.  Errors echo the
claim through :func:`audit.errors.shorten`.  All of these raise
:class:`audit.errors.ClaimError`.
"""

from __future__ import annotations

import re
import sys
from dataclasses import dataclass
from typing import Mapping

from ..errors import ClaimError, OptionError, shorten

__all__ = ["Claim", "parse_claim", "EXAMPLES", "MAX_CLAIM_CHARS", "MAX_SIGNIFICANT_DIGITS"]

#: longest claim accepted, in characters (a reported test line is well under 100)
MAX_CLAIM_CHARS = 300
#: most significant digits accepted in a number of a claim (float64 carries 17)
MAX_SIGNIFICANT_DIGITS = 20

EXAMPLES = ("AB: F(2, 54) = 4.11, p = .022", "A: p < .001")

_EFFECT_WORDS = {
    "a": "A",
    "b": "B",
    "ab": "AB",
    "a:b": "AB",
    "a*b": "AB",
    "axb": "AB",
    "a×b": "AB",
    "interaction": "AB",
}

_TRANSLATE = {
    "\u2212": "-",  # minus sign
    "\u2013": "-",  # en dash
    "\u2014": "-",  # em dash
    "\u2010": "-",
    "\u2011": "-",
    "\u2012": "-",
    "\ufe63": "-",
    "\uff0d": "-",
    "\u2264": "<=",
    "\u2265": ">=",
    "\u2266": "<=",
    "\u2267": ">=",
    "\uff1d": "=",
    "\uff1c": "<",
    "\uff1e": ">",
    "\u00a0": " ",
    "\u2009": " ",
    "\u202f": " ",
    "\u2007": " ",
    "\uff08": "(",
    "\uff09": ")",
    "\uff0c": ",",
    "*": "",
}

_NUM = r"(?:\d+(?:\.\d*)?|\.\d+)(?:e-?\d+|e\+\d+)?"
_REL = r"<=|>=|=<|=>|==|<|>|="
_F_PART = (
    r"f\s*(?:[\(\[]\s*(?P<df1>" + _NUM + r")\s*[,;]\s*(?P<df2>" + _NUM + r")\s*[\)\]])?"
    r"\s*(?P<frel>" + _REL + r")\s*(?P<F>-?" + _NUM + r")"
)
_P_PART = r"p\s*(?P<prel>" + _REL + r")\s*(?P<p>-?" + _NUM + r")"
_P_ALONE = r"p\s*(?P<prel2>" + _REL + r")\s*(?P<p2>-?" + _NUM + r")"
_NS = r"(?P<ns>n\.?\s?s\.?|not\s+significant|non-?significant)"
_TRAIL = (
    r"(?:\s*[,;]\s*(?:partial\s+)?(?:eta|η|omega|ω|mse|ges|cohen'?s\s+[df]|[dfr])[^,;=<>]{0,12}"
    r"(?:=|<|>)\s*-?" + _NUM + r")*"
)
_TEST = re.compile(
    r"^(?:" + _F_PART + r"(?:\s*[,;\-]?\s*(?:" + _P_PART + r"|" + _NS + r"))?"
    r"|" + _P_ALONE + r")" + _TRAIL + r"$",
    re.I,
)
_BODY_START = r"(?:f\s*[\(\[=<>]|p\s*[<>=]|n\.?\s?s\.?$|not\s+significant|non-?significant|present|absent|significant)"
_LABELLED = re.compile(r"^(?P<label>.*?)\s*:\s*(?P<body>" + _BODY_START + r".*)$", re.I | re.S)
_RELATIONS = {"=": "=", "==": "=", "<": "<", ">": ">", "<=": "<=", "=<": "<=", ">=": ">=", "=>": ">="}


@dataclass(frozen=True, kw_only=True)
class Claim:
    """A reported claim about one effect, as parsed.

    Attributes
    ----------
    effect : str
        'A', 'B' or 'AB'.
    kind : str
        'test' (reported numbers), 'present' or 'absent' (words only; ``ns`` alone is
        'absent').
    df1, df2 : float or None
        Reported degrees of freedom (None when not given).
    F : float or None
        Reported F statistic.
    F_relation : str or None
        '=' normally; '<' for lines such as ``F(2, 54) < 1``.
    F_decimals : int or None
        Digits reported after the decimal point (4.11 -> 2); the rounding
        interval is F +- 0.5 * 10^-F_decimals.
    p : float or None
        Reported p-value (the bound for ``p < .05``).
    p_relation : str or None
        '=', '<', '>', '<=', '>=' or None (no p reported).
    p_decimals : int or None
        Digits after the decimal point, exponent included (2.3e-4 -> 5).
    ns : bool
        True when the claim says "ns" / "not significant" (no p value given).
    text : str
        The claim exactly as given.
    """

    effect: str
    kind: str
    df1: float | None = None
    df2: float | None = None
    F: float | None = None
    F_relation: str | None = None
    F_decimals: int | None = None
    p: float | None = None
    p_relation: str | None = None
    p_decimals: int | None = None
    ns: bool = False
    text: str = ""

    @property
    def has_test(self) -> bool:
        """True when the claim reports an F or a p value to reconcile."""
        return self.kind == "test" and (self.F is not None or self.p is not None)

    def to_dict(self) -> dict:
        return {
            "effect": self.effect,
            "kind": self.kind,
            "df1": self.df1,
            "df2": self.df2,
            "F": self.F,
            "F_relation": self.F_relation,
            "F_decimals": self.F_decimals,
            "p": self.p,
            "p_relation": self.p_relation,
            "p_decimals": self.p_decimals,
            "ns": self.ns,
            "text": self.text,
        }


def _decimals(token: str) -> int:
    """Digits after the decimal point, counting the exponent: '4.107' -> 3,
    '2.3e-4' -> 5, '4' -> 0, '12e3' -> 0 (never negative)."""
    t = token.lower()
    mant, _, exp = t.partition("e")
    d = len(mant.partition(".")[2])
    if exp:
        d -= int(exp)
    return max(d, 0)


def _fail(text: str, found: str, fix: str = "") -> ClaimError:
    return ClaimError(
        f"claim {repr(shorten(text))}: expected a reported test such as {EXAMPLES[0]!r} or {EXAMPLES[1]!r} "
        f"(or the words present / absent / ns, optionally after a label AB:, A: or B:); "
        f"found {shorten(found)}; fix: {fix or 'rewrite the claim in one of these forms'}."
    )


def _number(text: str, token: str, name: str) -> float:
    """A number of the claim, bounded: at most MAX_SIGNIFICANT_DIGITS significant digits,
    finite, and not a nonzero value outside the normal float range."""
    mant = token.lstrip("-").lower().partition("e")[0]
    digits = mant.replace(".", "").lstrip("0")
    if len(digits) > MAX_SIGNIFICANT_DIGITS:
        raise _fail(text, f"{name} = {token} ({len(digits):,} significant digits)",
                    f"give {name} with at most {MAX_SIGNIFICANT_DIGITS} significant digits, as reported")
    v = float(token)
    if v != v or v in (float("inf"), float("-inf")):
        raise _fail(text, f"{name} = {token}, beyond the float range (about 1.8e308)",
                    f"give the reported value of {name}, a finite number")
    if digits.rstrip("0") and abs(v) < sys.float_info.min:
        raise _fail(text, f"{name} = {token}, below the smallest normal float (about 2.2e-308)",
                    f"report a value this small as a bound, e.g. {name} < 1e-300")
    return v


def _normalise(text: str) -> str:
    s = "".join(_TRANSLATE.get(ch, ch) for ch in text)
    s = re.sub(r"\s+", " ", s).strip()
    s = re.sub(r"[.\s]+$", "", s) if not re.search(r"n\.?\s?s\.$", s, re.I) else s
    return s.strip()


def _label_key(label: str) -> str:
    return re.sub(r"\s+", "", label).lower()


def _effect_of_label(label: str, text: str, names: Mapping[str, str] | None) -> str:
    key = _label_key(label)
    if names:
        for name, eff in names.items():
            if _label_key(_normalise(str(name))) == key:
                if eff not in ("A", "B", "AB"):
                    raise OptionError(
                        f"claim labels: the label {repr(shorten(str(name)))} maps to {repr(shorten(str(eff)))}; expected 'A', 'B' or 'AB'; "
                        f"fix: map each factor or interaction name to one of them."
                    )
                return eff
    if key in _EFFECT_WORDS:
        return _EFFECT_WORDS[key]
    known = ["AB", "A", "B"] + [str(n) for n in (names or {})]
    raise _fail(
        text,
        f"the effect label {label!r}, which is none of {', '.join(repr(k) for k in known)}",
        "label the claim AB:, A: or B: (or leave the label out for the interaction)",
    )


def parse_claim(text: str, *, effect: str | None = None, names: Mapping[str, str] | None = None) -> Claim:
    """Parse one reported claim.

    Parameters
    ----------
    text : str
        The claim, e.g. ``"AB: F(2, 54) = 4.11, p = .022"``, ``"p < .05"``, ``"ns"``,
        ``"absent"``.  Unlabelled claims are about the interaction.
    effect : str, optional
        'A', 'B' or 'AB': overrides the claim's own label.
    names : mapping, optional
        Extra labels accepted in front of the claim, mapped to 'A', 'B' or 'AB'
        (for instance the factor names: ``{"supp": "A", "dose": "B", "supp:dose": "AB"}``).

    Returns
    -------
    Claim

    Raises
    ------
    audit.errors.ClaimError
        (an :class:`audit.errors.OptionError`) when the text is longer than
        :data:`MAX_CLAIM_CHARS`, not one of the accepted forms, a label is unknown,
        or a value is impossible (negative F, p outside [0, 1], df not positive) or
        unbounded (more than :data:`MAX_SIGNIFICANT_DIGITS` significant digits,
        outside the float range, not finite).
    """
    if not isinstance(text, str):
        raise _fail(repr(text), f"a {type(text).__name__}, not text", "pass the claim as a string")
    if len(text) > MAX_CLAIM_CHARS:
        raise ClaimError(
            f"claim {repr(shorten(text))}: expected at most {MAX_CLAIM_CHARS} characters (a reported test such "
            f"as {EXAMPLES[0]!r}); found {len(text):,}; fix: give only the test line of the claim.")
    if effect is not None and effect not in ("A", "B", "AB"):
        raise OptionError(
            f"claim effect: expected 'A', 'B' or 'AB'; found {repr(shorten(str(effect)))}; fix: name the effect the claim is about."
        )
    s = _normalise(text)
    if not s:
        raise _fail(text, "an empty claim")
    label_effect = "AB"
    m = _LABELLED.match(s)
    if m:
        label_effect = _effect_of_label(m.group("label"), text, names)
        s = m.group("body").strip()
    eff = effect or label_effect
    low = s.lower()
    if low in ("present", "significant"):
        return Claim(effect=eff, kind="present", text=text)
    if low == "absent":
        return Claim(effect=eff, kind="absent", text=text)
    if re.fullmatch(_NS, low, re.I):
        return Claim(effect=eff, kind="absent", ns=True, text=text)
    t = _TEST.match(s)
    if not t:
        raise _fail(text, f"{s!r}, which is not a reported F test, a p value or one of those words")
    g = t.groupdict()
    if g.get("p2") is not None:
        g["p"], g["prel"] = g["p2"], g["prel2"]
    df1 = _number(text, g["df1"], "df1") if g.get("df1") else None
    df2 = _number(text, g["df2"], "df2") if g.get("df2") else None
    for name, v in (("df1", df1), ("df2", df2)):
        if v is not None and not v > 0:
            raise _fail(text, f"{name} = {v:g}", "degrees of freedom are positive numbers")
    F = F_rel = F_dec = None
    if g.get("F") is not None:
        F = _number(text, g["F"], "F")
        if F < 0:
            raise _fail(text, f"F = {g['F']}", "an F statistic is never negative; check the sign")
        F_rel = _RELATIONS[g["frel"]]
        F_dec = _decimals(g["F"])
    p = p_rel = p_dec = None
    if g.get("p") is not None:
        p = _number(text, g["p"], "p")
        if not 0.0 <= p <= 1.0:
            raise _fail(text, f"p = {g['p']}", "a p value lies between 0 and 1")
        p_rel = _RELATIONS[g["prel"]]
        p_dec = _decimals(g["p"])
    return Claim(
        effect=eff,
        kind="test",
        df1=df1,
        df2=df2,
        F=F,
        F_relation=F_rel,
        F_decimals=F_dec,
        p=p,
        p_relation=p_rel,
        p_decimals=p_dec,
        ns=bool(g.get("ns")),
        text=text,
    )
