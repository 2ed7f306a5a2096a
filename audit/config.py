"""Declared audits: read and check a ``[tool.twoway-audit]`` table (in a
repository's ``pyproject.toml``) or a standalone TOML file.

Layout (a standalone file holds the same keys at its top level)::

    [tool.twoway-audit]
    seed = 20240611            # shared settings, each audit may override them
    fail_on = ["does-not-hold", "not-reproducible", "fragile"]

    [[tool.twoway-audit.audit]]
    name = "rise-height"
    data = "data/rise_height.csv"          # relative to the file's folder
    response = "rise_mm"
    factors = ["starter", "proof_temp"]
    claim = "F(2, 42) = 38.5, p < .001"

    [[tool.twoway-audit.audit]]
    name = "loaf-volume"
    summary = "data/loaf_volume_cells.csv" # a cell table: one row per cell
    factors = ["starter", "hydration"]
    mean = "mean_ml"
    sd = "sd_ml"
    n = "loaves"
    claim = "absent"

Everything is checked here, before any audit runs: unknown keys, types,
ranges, claims, and paths.  Paths are relative to the folder of the file that
declares them and must stay inside the repository: the nearest folder at or
above that file holding ``.git``, or the file's own folder when there is none.
Every problem is a :class:`~audit.errors.ConfigError` naming the file, the
audit and the key.

Run mode always fixes the seed (default :data:`DEFAULT_SEED`), so a rerun on
unchanged inputs gives the same findings.
"""

from __future__ import annotations

import os
import re
import tomllib
from dataclasses import dataclass

from .errors import ConfigError, OptionError

__all__ = ["AuditSpec", "RunConfig", "load_config", "find_config", "check_claims", "DEFAULT_FAIL_ON",
           "DEFAULT_SEED", "AUDIT_KEYS", "DATA_KEYS", "SUMMARY_KEYS", "SHARED_KEYS", "VERDICTS"]

# Kept here (equal to audit.verdict.conclude.VERDICTS and audit.api.MAX_CALIBRATION, which a test
# checks) so that reading a config, and a fully cached run, load none of the numerical modules.
#: the verdicts, as in :data:`audit.verdict.conclude.VERDICTS`
VERDICTS = ("holds", "holds-with-caveats", "fragile", "does-not-hold", "not-reproducible", "cannot-judge")
_MAX_CALIBRATION = 100_000

#: verdicts that fail an audit unless its ``fail_on`` says otherwise
DEFAULT_FAIL_ON = ("does-not-hold", "not-reproducible", "fragile")

#: seed of every audit that does not set one (run mode never draws a fresh seed)
DEFAULT_SEED = 0

_COMMON = ("name", "response", "factors", "alpha", "claim", "seed", "calibration", "equivalence", "fail_on",
           "sheet", "encoding", "decimal")
_DATA_ONLY = ("data", "resamples", "levels", "order", "unit")
_SUMMARY_ONLY = ("summary", "mean", "sd", "n")

#: keys a data audit (``data``: one row per observation) takes
DATA_KEYS = _COMMON[:1] + _DATA_ONLY[:1] + _COMMON[1:] + _DATA_ONLY[1:]
#: keys a summary audit (``summary``: a cell table) takes; every other key is refused
SUMMARY_KEYS = _COMMON[:1] + _SUMMARY_ONLY[:1] + _COMMON[1:] + _SUMMARY_ONLY[1:]

#: keys an audit table accepts (each kind takes only its own: :data:`DATA_KEYS`, :data:`SUMMARY_KEYS`)
AUDIT_KEYS = _COMMON + _DATA_ONLY + _SUMMARY_ONLY

#: keys of the top-level table (shared settings, inherited by every audit) besides ``audit``
SHARED_KEYS = ("alpha", "resamples", "seed", "calibration", "fail_on")

_TOOL = "twoway-audit"


@dataclass(frozen=True, kw_only=True)
class AuditSpec:
    """One declared audit, checked and with its defaults filled in.

    Attributes
    ----------
    name : str
    kind : str
        'data' (raw observations, :func:`audit.check`) or 'summary' (a cell
        table, :func:`audit.check_summary`).
    path : str
        Absolute path of the data file or cell table.
    rel : str
        The path as declared, relative to the config file's folder ('/'-separated).
    response : str or None
    factors : (str, str)
    mean, sd, n : str or None
        Cell-table columns (summary audits).
    alpha : float
    claim : tuple of str or None
    resamples : int or None
        None for summary audits (no resampling).
    seed : int
    calibration : int or None
        None: the library's default.
    equivalence : float, str or None
    fail_on : tuple of str
    levels : tuple of (str, tuple of str) or None
    order, unit : optional
        As in :func:`audit.check` (data audits).
    sheet, encoding, decimal : optional
        As in :func:`audit.check` and :func:`audit.check_summary`.
    """

    name: str
    kind: str
    path: str
    rel: str
    response: str | None
    factors: tuple[str, str]
    mean: str | None = None
    sd: str | None = None
    n: str | None = None
    alpha: float = 0.05
    claim: tuple[str, ...] | None = None
    resamples: int | None = None
    seed: int = DEFAULT_SEED
    calibration: int | None = None
    equivalence: float | str | None = None
    fail_on: tuple[str, ...] = DEFAULT_FAIL_ON
    levels: tuple[tuple[str, tuple[str, ...]], ...] | None = None
    order: str | None = None
    unit: str | None = None
    sheet: str | int | None = None
    encoding: str | None = None
    decimal: str | None = None

    def settings(self) -> dict:
        """Everything that shapes the findings, as plain JSON values (for the
        cache key; ``fail_on`` is left out: it only decides pass or fail)."""
        return {
            "kind": self.kind, "input": self.rel, "response": self.response, "factors": list(self.factors),
            "mean": self.mean, "sd": self.sd, "n": self.n, "alpha": self.alpha,
            "claim": list(self.claim) if self.claim else None, "resamples": self.resamples, "seed": self.seed,
            "calibration": self.calibration, "equivalence": self.equivalence,
            "levels": [[f, list(v)] for f, v in self.levels] if self.levels else None,
            "order": self.order, "unit": self.unit, "sheet": self.sheet, "encoding": self.encoding,
            "decimal": self.decimal,
        }


@dataclass(frozen=True, kw_only=True)
class RunConfig:
    """A checked configuration.

    Attributes
    ----------
    file : str
        The config file as the user gave it (or 'pyproject.toml' when found).
    path : str
        Its absolute path.
    folder : str
        Its folder (declared paths are relative to it).
    root : str
        The repository folder that every declared path must stay inside.
    audits : tuple of AuditSpec
    """

    file: str
    path: str
    folder: str
    root: str
    audits: tuple[AuditSpec, ...]


# ------------------------------------------------------------------ helpers


def _repo_root(folder: str) -> str:
    """The nearest folder at or above ``folder`` holding ``.git``; ``folder`` when none."""
    here = folder
    while True:
        if os.path.exists(os.path.join(here, ".git")):
            return here
        up = os.path.dirname(here)
        if up == here:
            return folder
        here = up


def _inside(path: str, folder: str) -> bool:
    return path == folder or path.startswith(folder.rstrip(os.sep) + os.sep)


_LOC = re.compile(r"at line (\d+), column (\d+)")
_HEADER = re.compile(r"^\s*\[\[\s*(?:tool\s*\.\s*[\"']?twoway-audit[\"']?\s*\.\s*)?audit\s*\]\]")
_NAME = re.compile(r"""^\s*name\s*=\s*["']([^"']*)["']""")
_KEY = re.compile(r"""^\s*["']?([A-Za-z0-9_.\-]+)["']?\s*=""")


def _toml_error(exc: tomllib.TOMLDecodeError, text: str, shown: str) -> ConfigError:
    """A ConfigError for bad TOML, naming the audit table and key on the failing line when it can."""
    msg = str(exc)
    m = _LOC.search(msg)
    audit = key = None
    if m:
        line_no = int(m.group(1))
        lines = text.splitlines()
        line = lines[line_no - 1] if 0 < line_no <= len(lines) else ""
        k = _KEY.match(line)
        key = k.group(1) if k else None
        start = None
        for i in range(min(line_no, len(lines)) - 1, -1, -1):
            if _HEADER.match(lines[i]):
                start = i
                break
            if lines[i].lstrip().startswith("[") and i != line_no - 1:
                break  # another table: not inside an audit
        if start is not None:
            audit = f"#{sum(1 for ln in lines[:start + 1] if _HEADER.match(ln))}"
            for ln in lines[start + 1:]:
                if ln.lstrip().startswith("["):
                    break
                nm = _NAME.match(ln)
                if nm:
                    audit = nm.group(1)
                    break
    return ConfigError(f"not valid TOML ({msg}); fix the line (strings need quotes, lists brackets)",
                       file=shown, audit=audit, key=key)


def _strip_prefix(message: str, key: str) -> str:
    return message[len(key) + 2:] if message.startswith(key + ": ") else message


def _text(v, *, file, audit, key, allow_none=False):
    if v is None and allow_none:
        return None
    if not isinstance(v, str) or not v.strip():
        raise ConfigError(f"expected a non-empty string, found {v!r}", file=file, audit=audit, key=key)
    return v


def _whole(v, *, file, audit, key, lo=0, hi=None, hint=""):
    if isinstance(v, bool) or not isinstance(v, int) or v < lo or (hi is not None and v > hi):
        rng = f"from {lo:,} to {hi:,}" if hi is not None else f">= {lo}"
        raise ConfigError(f"expected a whole number {rng}, found {v!r}{hint}", file=file, audit=audit, key=key)
    return v


# ------------------------------------------------------------------ reading


def find_config(start: str | None = None) -> str:
    """The ``pyproject.toml`` in ``start`` (default: the current folder) that
    holds a ``[tool.twoway-audit]`` table; ConfigError when there is none."""
    folder = os.getcwd() if start is None else start
    path = os.path.join(folder, "pyproject.toml")
    shown = "pyproject.toml" if start is None else path
    if not os.path.isfile(path):
        raise ConfigError(f"no pyproject.toml in the current folder {os.path.abspath(folder)!r}; "
                          "run from the repository's top folder or give the config file: twoway-audit run FILE",
                          file=shown)
    return path


def _read(path: str, shown: str) -> dict:
    try:
        with open(path, "rb") as fh:
            raw = fh.read()
    except FileNotFoundError:
        raise ConfigError("config file not found; check the path", file=shown) from None
    except IsADirectoryError:
        raise ConfigError("is a folder; give a TOML file (or a folder holding pyproject.toml)", file=shown) from None
    except OSError as exc:
        raise ConfigError(f"cannot be read ({exc.strerror})", file=shown) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise ConfigError("is not UTF-8 text; TOML files are UTF-8", file=shown) from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise _toml_error(exc, text, shown) from None


def load_config(path=None, *, claims: bool = True) -> RunConfig:
    """Read and check a configuration.

    Parameters
    ----------
    path : str or path, optional
        A ``pyproject.toml`` (its ``[tool.twoway-audit]`` table is read), a
        standalone TOML file (its top level is read), or a folder holding a
        ``pyproject.toml``.  Default: ``pyproject.toml`` in the current folder.
    claims : bool, default True
        Also parse every claim and equivalence bound now.  False leaves that
        to :func:`check_claims` (the runner calls it for the audits it has to
        run, so a fully cached run loads no numerical module).

    Returns
    -------
    RunConfig

    Raises
    ------
    audit.errors.ConfigError
        Naming the file, the audit and the key at fault.
    """
    if path is None:
        path = find_config()
        shown = "pyproject.toml"
    else:
        shown = os.fspath(path)
        path = os.fspath(path)
        if os.path.isdir(path):
            path = find_config(path)
            shown = path
    doc = _read(path, shown)
    if os.path.basename(path) == "pyproject.toml":
        tool = doc.get("tool", {})
        table = tool.get(_TOOL) if isinstance(tool, dict) else None
        if table is None:
            raise ConfigError(f"has no [tool.{_TOOL}] table; declare audits as [[tool.{_TOOL}.audit]] tables",
                              file=shown, key=f"tool.{_TOOL}")
        if not isinstance(table, dict):
            raise ConfigError(f"expected a table, found {type(table).__name__}", file=shown, key=f"tool.{_TOOL}")
    else:
        table = doc
    abspath = os.path.abspath(path)
    folder = os.path.dirname(abspath)
    root = _repo_root(os.path.realpath(folder))
    for key in table:
        if key != "audit" and key not in SHARED_KEYS:
            raise ConfigError(f"unknown key; the top level accepts 'audit' (a list of [[audit]] tables) and the "
                              f"shared settings {', '.join(SHARED_KEYS)}", file=shown, key=key)
    audits = table.get("audit")
    if not isinstance(audits, list) or not audits or not all(isinstance(a, dict) for a in audits):
        header = f"[[tool.{_TOOL}.audit]]" if table is not doc else "[[audit]]"
        raise ConfigError(f"expected one or more {header} tables, found {type(audits).__name__ if audits is not None else 'none'}",
                          file=shown, key="audit")
    shared = {k: table[k] for k in SHARED_KEYS if k in table}
    specs = []
    names: set[str] = set()
    for i, raw in enumerate(audits):
        spec = _audit(raw, i, shared, shown=shown, folder=folder, root=root)
        if claims:
            check_claims(shown, [spec])
        if spec.name in names:
            raise ConfigError("two audits have this name; give each audit its own name", file=shown,
                              audit=spec.name, key="name")
        names.add(spec.name)
        specs.append(spec)
    return RunConfig(file=shown, path=abspath, folder=folder, root=root, audits=tuple(specs))


def check_claims(file: str, specs) -> None:
    """Parse the claims and equivalence bounds of ``specs``; ConfigError naming
    the file, the audit and the key when one cannot be read.

    Parameters
    ----------
    file : str
        The config file as shown to the user.
    specs : iterable of AuditSpec
    """
    specs = [s for s in specs if s.claim is not None or s.equivalence is not None]
    if not specs:
        return
    from .verdict.judge import parse_claims, parse_equivalence

    for spec in specs:
        if spec.claim is not None:
            try:
                parse_claims(list(spec.claim), factors=spec.factors)
            except OptionError as exc:
                raise ConfigError(_strip_prefix(str(exc), "claim"), file=file, audit=spec.name, key="claim") from None
        if spec.equivalence is not None:
            try:
                parse_equivalence(spec.equivalence)
            except OptionError as exc:
                raise ConfigError(_strip_prefix(str(exc), "equivalence"), file=file, audit=spec.name,
                                  key="equivalence") from None


def _path(value, *, file, audit, key, folder, root) -> tuple[str, str]:
    shown = file
    value = _text(value, file=file, audit=audit, key=key)
    full = os.path.normpath(os.path.join(os.path.realpath(folder), value))
    real = os.path.realpath(full)
    if not _inside(real, root):
        raise ConfigError(f"path {value!r} leads outside the repository folder {root!r}; keep the data inside the "
                          "repository (paths are relative to the config file's folder)", file=shown, audit=audit,
                          key=key)
    if not os.path.exists(real):
        raise ConfigError(f"file {value!r} not found (looked for {full!r}); paths are relative to the config "
                          "file's folder", file=shown, audit=audit, key=key)
    if os.path.isdir(real):
        raise ConfigError(f"{value!r} is a folder; expected a data file", file=shown, audit=audit, key=key)
    rel = os.path.relpath(full, os.path.realpath(folder)).replace(os.sep, "/")
    return full, rel


def _audit(raw: dict, i: int, shared: dict, *, shown, folder, root) -> AuditSpec:
    label = f"#{i + 1}"
    name = raw.get("name")
    if isinstance(name, str) and name.strip():
        label = name
    for key in raw:
        if key not in AUDIT_KEYS:
            raise ConfigError(f"unknown key; an audit accepts {', '.join(AUDIT_KEYS)}", file=shown, audit=label,
                              key=key)
    if "name" not in raw:
        raise ConfigError("missing; give every audit a name", file=shown, audit=label, key="name")
    name = _text(raw["name"], file=shown, audit=label, key="name")
    kw = {"file": shown, "audit": name}
    has_data, has_summary = "data" in raw, "summary" in raw
    if has_data == has_summary:
        raise ConfigError("give exactly one of 'data' (one row per observation) or 'summary' (a cell table)",
                          **kw, key="data" if has_data else "data/summary")
    kind = "data" if has_data else "summary"
    takes = DATA_KEYS if kind == "data" else SUMMARY_KEYS
    for key in raw:
        if key not in takes:  # a key this kind of audit would not use is refused, never ignored
            what, reads = (("data", "reads one row per observation") if kind == "data"
                           else ("summary", "reads a cell table, one row per cell"))
            raise ConfigError(f"not used by a {what} audit (this audit {reads}); remove it: a {what} audit "
                              f"takes {', '.join(takes)}", **kw, key=key)
    merged = {**shared, **raw}
    if kind == "summary" and "resamples" in merged and "resamples" not in raw:
        merged.pop("resamples")  # a shared setting that only data audits use
    path, rel = _path(raw[kind], **kw, key=kind, folder=folder, root=root)

    factors = merged.get("factors")
    if (not isinstance(factors, list) or len(factors) != 2 or not all(isinstance(f, str) and f for f in factors)
            or factors[0] == factors[1]):
        raise ConfigError(f"expected two different column names, e.g. [\"starter\", \"proof_temp\"], found {factors!r}",
                          **kw, key="factors")
    factors = (factors[0], factors[1])
    if kind == "data":
        if "response" not in merged:
            raise ConfigError("missing; name the numeric response column", **kw, key="response")
        response = _text(merged["response"], **kw, key="response")
    else:
        response = _text(merged.get("response", "y"), **kw, key="response")

    from .options import check_alpha, check_resamples, check_seed

    out: dict = {}
    for key, fn in (("alpha", check_alpha), ("resamples", check_resamples), ("seed", check_seed)):
        if key in merged:
            try:
                out[key] = fn(merged[key])
            except OptionError as exc:
                raise ConfigError(_strip_prefix(str(exc), key), **kw, key=key) from None
    if kind == "data":
        out.setdefault("resamples", 9999)
    if out.get("seed") is None:
        out["seed"] = DEFAULT_SEED
    if "calibration" in merged:
        out["calibration"] = _whole(merged["calibration"], **kw, key="calibration", hi=_MAX_CALIBRATION,
                                    hint="; try 2000 (0 turns the size check off)")

    claim = merged.get("claim")
    if claim is not None:
        if isinstance(claim, str):
            claim = [claim]
        if not isinstance(claim, list) or not claim or not all(isinstance(c, str) for c in claim):
            raise ConfigError(f"expected a reported test line, 'present', 'absent', or a list of them; found "
                              f"{merged['claim']!r}", **kw, key="claim")
        claim = tuple(claim)
    equivalence = merged.get("equivalence")
    if equivalence is not None:
        if isinstance(equivalence, bool) or not isinstance(equivalence, (int, float, str)):
            raise ConfigError(f"expected a number or 'eta2=X', found {equivalence!r}", **kw, key="equivalence")

    fail_on = merged.get("fail_on", list(DEFAULT_FAIL_ON))
    if isinstance(fail_on, str):
        fail_on = [fail_on]
    if not isinstance(fail_on, list) or not all(isinstance(v, str) for v in fail_on):
        raise ConfigError(f"expected a list of verdicts, found {fail_on!r}", **kw, key="fail_on")
    for v in fail_on:
        if v not in VERDICTS:
            raise ConfigError(f"unknown verdict {v!r}; choose from {', '.join(VERDICTS)}", **kw, key="fail_on")

    levels = merged.get("levels")
    if levels is not None:
        if not isinstance(levels, dict) or not levels:
            raise ConfigError(f"expected a table {{factor = [level, ...]}}, found {levels!r}", **kw, key="levels")
        fixed = []
        for f, vals in levels.items():
            if f not in factors:
                raise ConfigError(f"{f!r} is not one of the factors {list(factors)}", **kw, key=f"levels.{f}")
            if (not isinstance(vals, list) or not vals
                    or not all(isinstance(v, (str, int, float)) and not isinstance(v, bool) for v in vals)):
                raise ConfigError(f"expected a list of levels, found {vals!r}", **kw, key=f"levels.{f}")
            fixed.append((f, tuple(str(v) for v in vals)))
        levels = tuple(fixed)

    extra = {}
    for key in ("order", "unit", "encoding", "decimal", "mean", "sd", "n"):
        if key in merged:
            extra[key] = _text(merged[key], **kw, key=key)
    if kind == "summary":
        for key in ("mean", "sd", "n"):
            extra.setdefault(key, key)
    if "sheet" in merged:
        s = merged["sheet"]
        if isinstance(s, bool) or not isinstance(s, (str, int)):
            raise ConfigError(f"expected a sheet name or number, found {s!r}", **kw, key="sheet")
        extra["sheet"] = s
    if extra.get("decimal") not in (None, ".", ","):
        raise ConfigError(f"expected '.' or ',', found {extra['decimal']!r}", **kw, key="decimal")

    return AuditSpec(name=name, kind=kind, path=path, rel=rel, response=response, factors=factors,
                     claim=claim, equivalence=equivalence, fail_on=tuple(fail_on), levels=levels, **out, **extra)
