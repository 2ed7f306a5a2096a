"""Run declared audits (:mod:`audit.config`) and render their results for CI:
one line per audit, a JUnit XML file, a Markdown summary and the combined
findings JSON.

Every audit runs with a fixed seed and without a timestamp; its findings
record the input path as declared (relative to the config file's folder) and
no command line, so a rerun on unchanged inputs gives byte-identical JSON and
Markdown (the JUnit file carries run times, which vary).

With a cache folder, an audit whose key (SHA-256 of: the input file's SHA-256,
the audit's settings, the tool, Python and library versions) is unchanged
reuses its stored findings; its line says "(cached)".
"""

from __future__ import annotations

import hashlib
import json
import os
import platform
import re
import time
from dataclasses import dataclass

from .config import VERDICTS, AuditSpec, RunConfig, check_claims

__all__ = ["AuditResult", "RunOutcome", "run_config", "cache_key", "available_cores", "worker_count",
           "judged_effects", "failing_effects",
           "render_line", "render_junit", "render_markdown", "render_json"]

_CAUTION = ("An automated audit supports a statistician's judgement; it does not replace it. "
            "Independence of observations cannot be checked from the data.")


@dataclass(frozen=True, kw_only=True)
class AuditResult:
    """The outcome of one declared audit.

    Attributes
    ----------
    name : str
    verdict : str or None
        None when the audit could not run (see ``error``).
    reasons : tuple of dict
        The verdict's reasons ({'text', 'ref', 'weight'}), most important first.
    findings : dict or None
        The findings JSON as a dict.
    error : str or None
        The input problem that stopped the audit.
    failed : bool
        The verdict on a judged effect is one of the audit's ``fail_on``
        verdicts: the interaction's, or that of a main effect a claim names
        (see :func:`failing_effects`).
    fail_on : tuple of str
    cached : bool
        Reused from the cache folder.
    seconds : float
        Time taken (the cache look-up, for a cached audit).
    effects : tuple of (str, str)
        (effect, verdict) for every judged effect: the interaction ('AB')
        first, then each main effect ('A', 'B') a claim names.
    failed_effects : tuple of str
        The effects whose verdict is in ``fail_on``, in the order of ``effects``.
    """

    name: str
    verdict: str | None
    reasons: tuple
    findings: dict | None
    error: str | None
    failed: bool
    fail_on: tuple[str, ...]
    cached: bool
    seconds: float
    effects: tuple[tuple[str, str], ...] = ()
    failed_effects: tuple[str, ...] = ()


@dataclass(frozen=True, kw_only=True)
class RunOutcome:
    """All audits of one configuration, in declaration order.

    Attributes
    ----------
    config : RunConfig
    results : tuple of AuditResult
    seconds : float
    """

    config: RunConfig
    results: tuple[AuditResult, ...]
    seconds: float

    @property
    def failures(self) -> int:
        return sum(r.failed for r in self.results)

    @property
    def errors(self) -> int:
        return sum(r.error is not None for r in self.results)

    def exit_status(self) -> int:
        """2 when an audit could not run (an input problem), else 1 when any failed, else 0."""
        return 2 if self.errors else (1 if self.failures else 0)

    @property
    def config_name(self) -> str:
        """The config file relative to the repository folder ('/'-separated; stable across folders)."""
        c = self.config
        real = os.path.realpath(c.path)
        inside = real.startswith(c.root.rstrip(os.sep) + os.sep)
        return os.path.relpath(real, c.root).replace(os.sep, "/") if inside else os.path.basename(real)


# ------------------------------------------------------------------ running one audit


def _sha256(path: str) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _run_spec(spec: AuditSpec) -> dict:
    """Run one audit (in this process or a worker); a plain dict comes back."""
    import warnings

    from .errors import AuditInputError

    t0 = time.perf_counter()
    try:
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", category=RuntimeWarning)
            if spec.kind == "data":
                from .api import check

                f = check(spec.path, response=spec.response, factors=spec.factors, alpha=spec.alpha,
                          levels=dict(spec.levels) if spec.levels else None, order=spec.order, unit=spec.unit,
                          sheet=spec.sheet, encoding=spec.encoding, decimal=spec.decimal,
                          resamples=spec.resamples, seed=spec.seed, claim=list(spec.claim) if spec.claim else None,
                          calibration=spec.calibration, equivalence=spec.equivalence, timestamp=False)
            else:
                from .api import check_summary

                # the file itself, as check-summary reads it: one reader, so an error names the
                # same file line (a DataFrame read here first would number its rows from 0)
                f = check_summary(spec.path, factors=spec.factors, mean=spec.mean, sd=spec.sd, n=spec.n,
                                  response=spec.response, alpha=spec.alpha, sheet=spec.sheet,
                                  encoding=spec.encoding, decimal=spec.decimal, seed=spec.seed,
                                  claim=list(spec.claim) if spec.claim else None, calibration=spec.calibration,
                                  equivalence=spec.equivalence, timestamp=False)
        d = f.to_dict()
    except AuditInputError as exc:
        return {"error": str(exc).replace(spec.path, spec.rel), "seconds": time.perf_counter() - t0}
    prov = d["provenance"]
    prov.pop("timestamp", None)
    prov["input"] = spec.rel            # as declared, relative to the config file: same in every checkout
    prov["input_sha256"] = prov.get("input_sha256") or _sha256(spec.path)
    prov["command"] = None              # run mode: the settings are in the config file, not a command line
    if isinstance(d.get("summary_input"), dict) and d["summary_input"].get("input") is not None:
        d["summary_input"]["input"] = spec.rel   # the cell table's path, also as declared
    return {"findings": d, "seconds": time.perf_counter() - t0}


# ------------------------------------------------------------------ cache


def _library_versions() -> dict:
    from importlib import metadata

    out = {}
    for lib in ("numpy", "scipy", "pandas"):
        try:
            out[lib] = metadata.version(lib)
        except metadata.PackageNotFoundError:
            out[lib] = None
    return out


#: raised when run mode's findings change shape within a version (2: a summary audit records its
#: cell table as declared and is read through check_summary), so older cache entries are not reused
CACHE_FORMAT = 2


def cache_key(spec: AuditSpec, *, libraries: dict | None = None) -> str:
    """SHA-256 of the input file's SHA-256, the audit's settings, :data:`CACHE_FORMAT` and the tool,
    Python and library versions."""
    from . import __version__

    doc = {"tool": "twoway-audit", "version": __version__, "cache_format": CACHE_FORMAT,
           "python": platform.python_version(),
           "libraries": libraries if libraries is not None else _library_versions(),
           "settings": spec.settings(), "input_sha256": _sha256(spec.path)}
    return hashlib.sha256(json.dumps(doc, sort_keys=True, ensure_ascii=True).encode("ascii")).hexdigest()


def _cache_file(folder: str, name: str) -> str:
    slug = re.sub(r"[^A-Za-z0-9._-]+", "_", name).strip("._")[:60] or "audit"
    return os.path.join(folder, f"{slug}-{hashlib.sha256(name.encode('utf-8')).hexdigest()[:12]}.json")


def _cache_load(path: str, key: str, name: str) -> dict | None:
    """The stored findings when the entry exists, parses and carries this key; else None."""
    try:
        with open(path, encoding="utf-8") as fh:
            doc = json.load(fh)
    except (OSError, ValueError):
        return None
    if not isinstance(doc, dict) or doc.get("tool") != "twoway-audit" or doc.get("key") != key \
            or doc.get("name") != name:
        return None
    f = doc.get("findings")
    if not isinstance(f, dict) or f.get("verdict") not in VERDICTS or not isinstance(f.get("reasons"), list):
        return None
    return f


# ------------------------------------------------------------------ running all


def available_cores() -> int:
    """The cores this process may run on: ``os.process_cpu_count()`` (Python 3.13+), else
    the CPU affinity mask, else ``os.cpu_count()``; at least 1."""
    fn = getattr(os, "process_cpu_count", None)
    n = fn() if fn is not None else None
    if not n and hasattr(os, "sched_getaffinity"):
        try:
            n = len(os.sched_getaffinity(0))
        except OSError:
            n = None
    if not n:
        n = os.cpu_count()
    return max(1, int(n or 1))


def worker_count(jobs: int, audits: int) -> tuple[int, str | None]:
    """The worker processes to start for ``jobs`` requested and ``audits`` to run: at most
    the cores available and the number of audits.  Returns (count, why it is lower than
    ``jobs``, or None)."""
    cores = available_cores()
    n = max(1, min(jobs, cores, max(audits, 1)))
    if n >= jobs:
        return n, None
    why = []
    if cores < jobs and n == cores:
        why.append(f"{cores} core{'s' if cores != 1 else ''} available")
    if audits < jobs and n == max(audits, 1):
        why.append(f"{audits} audit{'s' if audits != 1 else ''} to run")
    return n, ", ".join(why)


def _worker_init() -> None:
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)   # the parent handles Ctrl-C and stops the workers
    signal.signal(signal.SIGTERM, signal.SIG_DFL)


_EFFECTS = ("AB", "A", "B")


def judged_effects(findings: dict) -> tuple[tuple[str, str], ...]:
    """(effect, verdict) for every effect the findings judge: the interaction first, then
    each main effect a claim names (findings without per-effect verdicts: the overall one)."""
    out = [(e["effect"], e["verdict"]) for e in findings.get("effect_verdicts") or ()
           if isinstance(e, dict) and e.get("effect") in _EFFECTS and e.get("verdict") in VERDICTS]
    if not any(e == "AB" for e, _ in out) and findings.get("verdict") in VERDICTS:
        out.insert(0, ("AB", findings["verdict"]))
    return tuple(out)


def failing_effects(findings: dict, fail_on) -> tuple[str, ...]:
    """The judged effects whose verdict is one of ``fail_on``.

    The rule of run mode: an audit fails when the verdict on *any* judged effect is in
    its ``fail_on`` -- the interaction's, and that of each main effect a claim names
    (a main-effect line that cannot be reproduced or does not hold fails the audit,
    exactly like an interaction line).  Main effects that no claim names are not judged.
    """
    return tuple(e for e, v in judged_effects(findings) if v in fail_on)


def _result(spec: AuditSpec, raw: dict, *, cached: bool, seconds: float | None = None) -> AuditResult:
    if "error" in raw:
        return AuditResult(name=spec.name, verdict=None, reasons=(), findings=None, error=raw["error"],
                           failed=False, fail_on=spec.fail_on, cached=False, seconds=raw["seconds"])
    f = raw["findings"]
    v = f.get("verdict")
    failing = failing_effects(f, spec.fail_on)
    return AuditResult(name=spec.name, verdict=v, reasons=tuple(f.get("reasons") or ()), findings=f, error=None,
                       failed=bool(failing), fail_on=spec.fail_on, cached=cached,
                       seconds=raw["seconds"] if seconds is None else seconds,
                       effects=judged_effects(f), failed_effects=failing)


def run_config(config: RunConfig, *, jobs: int = 1, cache: str | None = None, on_result=None) -> RunOutcome:
    """Run every audit of ``config``.

    Parameters
    ----------
    config : RunConfig
    jobs : int, default 1
        Worker processes (1 runs the audits in this process, one after another);
        never more than the cores available (:func:`available_cores`) or the
        audits left to run.
    cache : str, optional
        Folder of stored findings (created when missing); audits whose key is
        unchanged are not run again.
    on_result : callable, optional
        Called with each :class:`AuditResult`, in declaration order, as soon
        as it and every earlier one are done.

    Returns
    -------
    RunOutcome
    """
    from ._io import refuse_input_overlap, write_file

    t0 = time.perf_counter()
    specs = config.audits
    inputs = [config.path, *(s.path for s in specs)]
    keys: dict[str, str] = {}
    ready: dict[int, AuditResult] = {}
    if cache is not None:
        libs = _library_versions()
        for i, s in enumerate(specs):
            t = time.perf_counter()
            keys[s.name] = cache_key(s, libraries=libs)
            f = _cache_load(_cache_file(cache, s.name), keys[s.name], s.name)
            if f is not None:
                ready[i] = _result(s, {"findings": f}, cached=True, seconds=time.perf_counter() - t)
    todo = [i for i in range(len(specs)) if i not in ready]
    check_claims(config.file, [specs[i] for i in todo])  # before any audit runs (a cached one parsed before)

    def store(i: int, raw: dict) -> AuditResult:
        s = specs[i]
        r = _result(s, raw, cached=False)
        if cache is not None and r.error is None:
            path = _cache_file(cache, s.name)
            refuse_input_overlap(path, inputs, option="--cache")
            doc = {"tool": "twoway-audit", "key": keys[s.name], "name": s.name, "findings": r.findings}
            write_file(path, (json.dumps(doc, indent=1, allow_nan=False, ensure_ascii=False) + "\n").encode("utf-8"))
        return r

    results: list[AuditResult] = []
    jobs, _ = worker_count(jobs, len(todo))
    if jobs <= 1:
        for i in range(len(specs)):
            r = ready[i] if i in ready else store(i, _run_spec(specs[i]))
            results.append(r)
            if on_result is not None:
                on_result(r)
    else:
        from concurrent.futures import ProcessPoolExecutor

        pool = ProcessPoolExecutor(max_workers=jobs, initializer=_worker_init)
        try:
            futures = {i: pool.submit(_run_spec, specs[i]) for i in todo}
            for i in range(len(specs)):
                r = ready[i] if i in ready else store(i, futures[i].result())
                results.append(r)
                if on_result is not None:
                    on_result(r)
        except BaseException:
            for p in list((getattr(pool, "_processes", None) or {}).values()):
                p.terminate()
            pool.shutdown(wait=False, cancel_futures=True)
            raise
        pool.shutdown()
    return RunOutcome(config=config, results=tuple(results), seconds=time.perf_counter() - t0)


# ------------------------------------------------------------------ renderers


def _shorten(text: str, width: int) -> str:
    text = " ".join(str(text).split())
    return text if len(text) <= width else text[: width - 3].rstrip() + "..."


def _effect_name(r: AuditResult, effect: str) -> str:
    """'A (flour)' for a main effect, 'interaction' for AB."""
    if effect == "AB":
        return "interaction"
    factors = (r.findings or {}).get("factors") or ()
    i = "AB".index(effect)
    return f"{effect} ({factors[i]})" if len(factors) == 2 else effect


def _effect_reasons(r: AuditResult, effect: str) -> tuple:
    if effect == "AB":
        return r.reasons
    for e in (r.findings or {}).get("effect_verdicts") or ():
        if isinstance(e, dict) and e.get("effect") == effect:
            return tuple(e.get("reasons") or ())
    return ()


def _lead_effect(r: AuditResult) -> str:
    """The effect whose reasons lead: the interaction unless only a main effect fails."""
    return r.failed_effects[0] if r.failed_effects else "AB"


def _verdict_text(r: AuditResult, code=lambda v: v, name=lambda t: t) -> str:
    """The overall verdict, then each claimed main effect's: 'holds; A (flour): not-reproducible'
    (``code`` marks up a verdict word, ``name`` escapes an effect's name)."""
    parts = [code(r.verdict)] + [f"{name(_effect_name(r, e))}: {code(v)}" for e, v in r.effects if e != "AB"]
    return "; ".join(parts)


def _failed_verdict(r: AuditResult) -> str:
    e = _lead_effect(r)
    return dict(r.effects).get(e, r.verdict) if e != "AB" else r.verdict


def _top_reason(r: AuditResult) -> str:
    if r.error is not None:
        return r.error
    e = _lead_effect(r)
    reasons = _effect_reasons(r, e)
    text = reasons[0]["text"] if reasons else "(no reason given)"
    return text if e == "AB" else f"{_effect_name(r, e)}: {text}"


def _status(r: AuditResult) -> str:
    return "ERROR" if r.error is not None else ("FAIL" if r.failed else "pass")


def render_line(r: AuditResult, *, width: int = 110) -> str:
    """One line for the terminal: status, name, verdict, '(cached)', the top reason shortened."""
    from .render.text import sanitize

    what = "could not run" if r.error is not None else _verdict_text(r)
    cached = " (cached)" if r.cached else ""
    return sanitize(f"{_status(r):<5} {r.name}: {what}{cached} - {_shorten(_top_reason(r), width)}")


_XML_BAD = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ud800-\udfff\ufffe\uffff]")


def _x(text) -> str:
    """Text safe for XML 1.0 (characters it cannot hold are dropped)."""
    return _XML_BAD.sub("", str(text))


def _reason_lines(r: AuditResult) -> str:
    lines = [f"verdict: {_verdict_text(r)}", f"fail_on: {', '.join(r.fail_on) or '(nothing)'}"]
    if r.failed_effects:
        lines.append(f"failed: {', '.join(_effect_name(r, e) for e in r.failed_effects)}")
    for e, v in r.effects or (("AB", r.verdict),):
        lines.append("reasons:" if e == "AB" else f"reasons ({_effect_name(r, e)}: {v}):")
        lines += [f"- [{x.get('weight')}] {x.get('text')} ({x.get('ref')})" for x in _effect_reasons(r, e)]
    return "\n".join(lines)


def render_junit(outcome: RunOutcome) -> bytes:
    """The JUnit XML file: testsuites / testsuite / testcase (one per audit), a
    ``failure`` for a failing verdict, an ``error`` for an audit that could not run."""
    import xml.etree.ElementTree as ET

    n = len(outcome.results)
    counts = {"tests": str(n), "failures": str(outcome.failures), "errors": str(outcome.errors)}
    suites = ET.Element("testsuites", name="twoway-audit", **counts, time=f"{outcome.seconds:.3f}")
    suite = ET.SubElement(suites, "testsuite", name=_x(f"twoway-audit {outcome.config_name}"), **counts,
                          skipped="0", time=f"{sum(r.seconds for r in outcome.results):.3f}")
    classname = _x("twoway-audit." + outcome.config_name)
    for r in outcome.results:
        tc = ET.SubElement(suite, "testcase", classname=classname, name=_x(r.name), time=f"{r.seconds:.3f}")
        if r.error is not None:
            e = ET.SubElement(tc, "error", type="input-error", message=_x(_shorten(r.error, 300)))
            e.text = _x(r.error)
            continue
        if r.failed:
            fl = ET.SubElement(tc, "failure", type=_x(_failed_verdict(r)),
                               message=_x(f"{_failed_verdict(r)}: {_shorten(_top_reason(r), 300)}"))
            fl.text = _x(_reason_lines(r))
        out = ET.SubElement(tc, "system-out")
        out.text = _x(_reason_lines(r) + ("\n(cached)" if r.cached else ""))
    ET.indent(suites)
    return b'<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(suites, encoding="unicode").encode("utf-8") + b"\n"


_MD_SPECIAL = re.compile(r"([\\`*_\[\]|~#!{}])")


def _md(text) -> str:
    """A user string made inert in a Markdown table cell (no markup, links, mentions or HTML)."""
    s = " ".join(_x(text).split())
    s = s.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    s = _MD_SPECIAL.sub(r"\\\1", s)
    return s.replace("@", "&#64;")


def render_markdown(outcome: RunOutcome) -> str:
    """A summary fit for a pull-request comment: a heading and one table row per audit."""
    n, k, e = len(outcome.results), outcome.failures, outcome.errors
    head = f"{k} of {n} audit{'s' if n != 1 else ''} failed" if k else f"all {n} audit{'s' if n != 1 else ''} passed"
    if e:
        head += f", {e} could not run"
    lines = [f"### twoway-audit: {head}", "",
             f"Declared in `{_md(outcome.config_name)}`.", "",
             "| Audit | Result | Verdict | Main reason |", "|---|---|---|---|"]
    for r in outcome.results:
        status = {"ERROR": "**error**", "FAIL": "**fail**", "pass": "pass"}[_status(r)]
        verdict = "-" if r.verdict is None else _verdict_text(r, lambda v: f"`{v}`", _md)
        lines.append(f"| {_md(r.name)} | {status} | {verdict} | {_md(_shorten(_top_reason(r), 300))} |")
    lines += ["", f"_{_CAUTION}_", ""]
    return "\n".join(lines)


def render_json(outcome: RunOutcome) -> str:
    """The combined findings JSON: every audit's findings keyed by its name (no timestamps)."""
    from . import __version__

    doc = {
        "tool": "twoway-audit",
        "version": __version__,
        "config": outcome.config_name,
        "exit_status": outcome.exit_status(),
        "audits": {
            r.name: {"verdict": r.verdict, "effects": dict(r.effects), "failed": r.failed,
                     "failed_effects": list(r.failed_effects), "fail_on": list(r.fail_on), "error": r.error,
                     "findings": r.findings}
            for r in outcome.results
        },
    }
    return json.dumps(doc, indent=2, allow_nan=False, ensure_ascii=False) + "\n"
