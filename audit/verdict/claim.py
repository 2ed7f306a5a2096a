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
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Mapping

from ..errors import OptionError

__all__ = ["Claim", "parse_claim", "EXAMPLES"]

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


def _fail(text: str, found: str, fix: str = "") -> OptionError:
    return OptionError(
        f"claim {text!r}: expected a reported test such as {EXAMPLES[0]!r} or {EXAMPLES[1]!r} "
        f"(or the words present / absent / ns, optionally after a label AB:, A: or B:); "
        f"found {found}; fix: {fix or 'rewrite the claim in one of these forms'}."
    )


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
                        f"claim labels: the label {name!r} maps to {eff!r}; expected 'A', 'B' or 'AB'; "
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
    audit.errors.OptionError
        When the text is not one of the accepted forms, a label is unknown, or a
        value is impossible (negative F, p outside [0, 1], df not positive).
    """
    if not isinstance(text, str):
        raise _fail(repr(text), f"a {type(text).__name__}, not text", "pass the claim as a string")
    if effect is not None and effect not in ("A", "B", "AB"):
        raise OptionError(
            f"claim effect: expected 'A', 'B' or 'AB'; found {effect!r}; fix: name the effect the claim is about."
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
    df1 = float(g["df1"]) if g.get("df1") else None
    df2 = float(g["df2"]) if g.get("df2") else None
    for name, v in (("df1", df1), ("df2", df2)):
        if v is not None and not v > 0:
            raise _fail(text, f"{name} = {v:g}", "degrees of freedom are positive numbers")
    F = F_rel = F_dec = None
    if g.get("F") is not None:
        F = float(g["F"])
        if F < 0:
            raise _fail(text, f"F = {g['F']}", "an F statistic is never negative; check the sign")
        F_rel = _RELATIONS[g["frel"]]
        F_dec = _decimals(g["F"])
    p = p_rel = p_dec = None
    if g.get("p") is not None:
        p = float(g["p"])
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
