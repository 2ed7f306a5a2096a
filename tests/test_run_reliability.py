"""Run mode's reliability: keys a summary audit does not use are refused, a summary audit's
errors name the same file line as check-summary, claimed main effects count under
``fail_on``, and ``--jobs`` never starts more workers than cores or audits.

Every input is generated in the test.  Expected behaviours (refuse what would be ignored,
one reader for one file, fail a CI check on any failing claim, no more workers than cores)
are common practice; the one statistic the tests lean on, a main effect's F in a balanced
design, is taken from statsmodels (reference: statsmodels ``anova_lm``).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import xml.etree.ElementTree as ET

import numpy as np
import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

# a generated 2 x 3 table of cell statistics: a large effect of 'site', none of the interaction
CELLS = ("site,feed,mean,sd,n\n"
         "north,f1,20.1,2.0,10\nnorth,f2,20.6,2.2,10\nnorth,f3,21.0,1.9,10\n"
         "south,f1,30.2,2.1,10\nsouth,f2,30.4,2.0,10\nsouth,f3,31.1,2.3,10\n")
SUMMARY_AUDIT = """
[[audit]]
name = "cells"
summary = "cells.csv"
factors = ["site", "feed"]
calibration = 0
"""


def _repo(tmp_path, config: str, cells: str = CELLS):
    (tmp_path / ".git").mkdir(exist_ok=True)
    (tmp_path / "cells.csv").write_text(cells, "utf-8")
    (tmp_path / "audits.toml").write_text(config, "utf-8")
    return tmp_path


def _main(argv, cwd, monkeypatch, capsys):
    from audit.cli import main

    monkeypatch.chdir(cwd)
    code = main(argv)
    out = capsys.readouterr()
    return code, out.out, out.err


# ---------------------------------------------------------------------------- keys a summary audit does not use


@pytest.mark.parametrize("line,key", [
    ('levels = { site = ["south", "north"] }', "levels"),
    ("resamples = 99", "resamples"),
    ('order = "run"', "order"),
    ('unit = "pen"', "unit"),
])
def test_summary_audit_refuses_a_key_it_does_not_use(tmp_path, monkeypatch, capsys, line, key):
    from audit.config import SUMMARY_KEYS, load_config
    from audit.errors import ConfigError

    repo = _repo(tmp_path, SUMMARY_AUDIT + line + "\n")
    with pytest.raises(ConfigError) as e:
        load_config(repo / "audits.toml")
    msg = str(e.value)
    assert e.value.key == key and e.value.audit == "cells"
    assert msg.startswith(str(repo / "audits.toml") + ": audit 'cells': key " + repr(key)), msg
    assert "a summary audit takes " + ", ".join(SUMMARY_KEYS) in msg
    assert "levels" not in SUMMARY_KEYS and "mean" in SUMMARY_KEYS
    code, out, err = _main(["run", "audits.toml"], repo, monkeypatch, capsys)
    assert code == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("twoway-audit: error: audits.toml: audit 'cells': key ")


def test_data_audit_refuses_summary_keys_and_names_its_own(tmp_path):
    from audit.config import DATA_KEYS, load_config
    from audit.errors import ConfigError

    repo = _repo(tmp_path, '[[audit]]\nname = "obs"\ndata = "cells.csv"\nresponse = "mean"\n'
                           'factors = ["site", "feed"]\nsd = "sd"\n')
    with pytest.raises(ConfigError) as e:
        load_config(repo / "audits.toml")
    assert e.value.key == "sd" and "a data audit takes " + ", ".join(DATA_KEYS) in str(e.value)
    assert "levels" in DATA_KEYS and "sd" not in DATA_KEYS


def test_summary_audit_takes_sheet_encoding_and_decimal_like_check_summary(tmp_path, monkeypatch, capsys):
    # a ';'-separated table with decimal commas in Latin-1: run mode reads it as check-summary does
    text = CELLS.replace(",", ";").replace(".", ",").replace("north", "n\u00f6rth")
    (tmp_path / ".git").mkdir()
    (tmp_path / "cells.csv").write_bytes(text.encode("latin-1"))
    (tmp_path / "audits.toml").write_text(SUMMARY_AUDIT + 'encoding = "latin-1"\ndecimal = ","\nseed = 5\n', "utf-8")
    code, out, err = _main(["run", "audits.toml", "--json", "run.json"], tmp_path, monkeypatch, capsys)
    assert code == 0, out + err
    code2, _, err2 = _main(["check-summary", "cells.csv", "--factors", "site", "feed", "--mean", "mean", "--sd",
                            "sd", "--n", "n", "--encoding", "latin-1", "--decimal", ",", "--calibration", "0",
                            "--seed", "5", "--no-timestamp", "--json", "cs.json"], tmp_path, monkeypatch, capsys)
    assert code2 == 0, err2
    a = json.loads((tmp_path / "run.json").read_text("utf-8"))["audits"]["cells"]["findings"]
    b = json.loads((tmp_path / "cs.json").read_text("utf-8"))
    a.pop("provenance"), b.pop("provenance")
    assert a["summary_input"].pop("input") == "cells.csv"  # as declared: the same in every checkout
    assert b["summary_input"].pop("input").endswith("cells.csv")
    assert a == b  # the same findings, the summary table's reading included


# ---------------------------------------------------------------------------- the same file line


def test_summary_audit_error_names_the_file_line_check_summary_names(tmp_path, monkeypatch, capsys):
    lines = CELLS.splitlines()
    lines[5] = lines[5].replace("30.4", "30.4x")  # file line 6 (the header is line 1)
    repo = _repo(tmp_path, SUMMARY_AUDIT, "\n".join(lines) + "\n")
    code, _, err = _main(["check-summary", "cells.csv", "--factors", "site", "feed", "--mean", "mean", "--sd", "sd",
                          "--n", "n", "--calibration", "0"], repo, monkeypatch, capsys)
    assert code == 2
    direct = err.strip().removeprefix("twoway-audit: error: ")
    assert " 6," in direct and "'30.4x'" in direct, direct
    code, out, err = _main(["run", "audits.toml", "--junit", "j.xml"], repo, monkeypatch, capsys)
    assert code == 2
    assert err.strip() == f"twoway-audit: error: audits.toml: audit 'cells': {direct}"
    assert f"ERROR cells: could not run - {direct}" in out
    assert ET.parse(repo / "j.xml").getroot().find("testsuite/testcase/error").text == direct


# ---------------------------------------------------------------------------- claimed main effects under fail_on


def _observations(seed=11):
    """Generated raw data: 2 x 2, 8 per cell, a large effect of 'site' only."""
    rng = np.random.default_rng(seed)
    rows = []
    for i, site in enumerate(("north", "south")):
        for feed in ("f1", "f2"):
            for v in 20.0 + 10.0 * i + rng.normal(0.0, 2.0, 8):
                rows.append((site, feed, round(float(v), 3)))
    return rows


def _site_f(rows) -> float:
    import pandas as pd
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    df = pd.DataFrame(rows, columns=["site", "feed", "y"])
    table = sm.stats.anova_lm(smf.ols("y ~ C(site) * C(feed)", df).fit(), typ=2)  # reference: statsmodels
    return float(table.loc["C(site)", "F"])


def _data_repo(tmp_path, claim: str, extra: str = ""):
    rows = _observations()
    (tmp_path / ".git").mkdir(exist_ok=True)
    (tmp_path / "obs.csv").write_text("site,feed,y\n" + "".join(f"{s},{f},{v}\n" for s, f, v in rows), "utf-8")
    (tmp_path / "audits.toml").write_text(
        f'[[audit]]\nname = "obs"\ndata = "obs.csv"\nresponse = "y"\nfactors = ["site", "feed"]\n'
        f'resamples = 0\ncalibration = 0\nclaim = {json.dumps(claim)}\n{extra}', "utf-8")
    return tmp_path, _site_f(rows)


def test_reproduced_main_effect_claim_passes(tmp_path, monkeypatch, capsys):
    repo, f = _data_repo(tmp_path, "")
    assert f > 50  # the generated effect is large
    (repo / "audits.toml").write_text((repo / "audits.toml").read_text().replace(
        'claim = ""', f'claim = "site: F(1, 28) = {f:.2f}, p < .001"'), "utf-8")
    code, out, err = _main(["run", "audits.toml", "--json", "all.json"], repo, monkeypatch, capsys)
    assert code == 0, out + err
    a = json.loads((repo / "all.json").read_text())["audits"]["obs"]
    assert a["effects"]["A"] in ("holds", "holds-with-caveats") and a["failed_effects"] == []
    assert "; A (site): holds" in out


@pytest.mark.parametrize("claim,verdict", [
    ("site: F(1, 28) = 3.10, p = .089", "not-reproducible"),   # a line the data cannot give
    ("A: absent", "does-not-hold"),                              # every method finds the effect
])
def test_failing_main_effect_claim_fails_the_audit(tmp_path, monkeypatch, capsys, claim, verdict):
    repo, _ = _data_repo(tmp_path, claim)
    code, out, err = _main(["run", "audits.toml", "--junit", "j.xml", "--markdown", "s.md", "--json", "all.json"],
                           repo, monkeypatch, capsys)
    assert code == 1, out + err
    assert err == ""
    assert out.startswith(f"FAIL  obs: ") and f"; A (site): {verdict} - A (site): " in out, out
    a = json.loads((repo / "all.json").read_text())
    assert a["exit_status"] == 1 and a["audits"]["obs"]["failed"] is True
    assert a["audits"]["obs"]["failed_effects"] == ["A"] and a["audits"]["obs"]["effects"]["A"] == verdict
    assert a["audits"]["obs"]["verdict"] not in ("does-not-hold", "not-reproducible", "fragile")  # the interaction's
    fl = ET.parse(repo / "j.xml").getroot().find("testsuite/testcase/failure")
    assert fl is not None and fl.get("type") == verdict and fl.get("message").startswith(f"{verdict}: A (site): ")
    assert f"reasons (A (site): {verdict}):" in fl.text
    md = (repo / "s.md").read_text()
    assert "1 of 1 audit failed" in md and f"| obs | **fail** |" in md and f"A (site): `{verdict}`" in md
    # the audit's own fail_on decides, for main effects as for the interaction
    text = (repo / "audits.toml").read_text() + 'fail_on = ["cannot-judge"]\n'
    (repo / "audits.toml").write_text(text, "utf-8")
    code, out, _ = _main(["run", "audits.toml"], repo, monkeypatch, capsys)
    assert code == 0 and out.startswith("pass  obs: ")


def test_main_effect_failure_survives_the_cache(tmp_path, monkeypatch, capsys):
    repo = _repo(tmp_path, SUMMARY_AUDIT + 'claim = ["absent", "site: F(1, 54) = 2.00, p = .163"]\n')
    first = _main(["run", "audits.toml", "--cache", "c"], repo, monkeypatch, capsys)
    again = _main(["run", "audits.toml", "--cache", "c"], repo, monkeypatch, capsys)
    assert first[0] == again[0] == 1, first
    assert "(cached)" in again[1] and again[1].replace(" (cached)", "") == first[1]
    assert "A (site): not-reproducible" in first[1]


def test_failing_effects_rule():
    from audit.config import DEFAULT_FAIL_ON
    from audit.runner import failing_effects, judged_effects

    f = {"verdict": "holds", "effect_verdicts": [{"effect": "AB", "verdict": "holds"},
                                                 {"effect": "B", "verdict": "fragile"}]}
    assert judged_effects(f) == (("AB", "holds"), ("B", "fragile"))
    assert failing_effects(f, DEFAULT_FAIL_ON) == ("B",)
    assert failing_effects(f, ("does-not-hold",)) == ()
    # findings without per-effect verdicts: the overall verdict is the interaction's
    assert failing_effects({"verdict": "does-not-hold"}, DEFAULT_FAIL_ON) == ("AB",)


# ---------------------------------------------------------------------------- --jobs


def test_available_cores_prefers_the_process_count_then_affinity_then_cpu_count(monkeypatch):
    from audit import runner

    monkeypatch.setattr(os, "process_cpu_count", lambda: 3, raising=False)
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {0, 1, 2, 3}, raising=False)
    monkeypatch.setattr(os, "cpu_count", lambda: 64)
    assert runner.available_cores() == 3
    monkeypatch.delattr(os, "process_cpu_count")
    assert runner.available_cores() == 4
    monkeypatch.delattr(os, "sched_getaffinity")
    assert runner.available_cores() == 64
    monkeypatch.setattr(os, "cpu_count", lambda: None)
    assert runner.available_cores() == 1


class _Pool:
    """Stands in for ProcessPoolExecutor: records max_workers, runs each call at once."""

    started: list = []

    def __init__(self, max_workers=None, initializer=None):
        _Pool.started.append(max_workers)

    def submit(self, fn, *args):
        from concurrent.futures import Future

        fut = Future()
        fut.set_result(fn(*args))
        return fut

    def shutdown(self, wait=True, cancel_futures=False):
        pass


@pytest.mark.parametrize("cores,jobs,workers,note", [
    (2, 16, 2, "--jobs 16 lowered to 2 (2 cores available)"),
    (8, 16, 3, "--jobs 16 lowered to 3 (3 audits to run)"),
    (3, 16, 3, "--jobs 16 lowered to 3 (3 cores available, 3 audits to run)"),
    (2, 2, 2, None),
    (1, 4, None, "--jobs 4 lowered to 1 (1 core available)"),  # one worker: run in this process
])
def test_jobs_are_capped_at_cores_and_audits(tmp_path, monkeypatch, capsys, cores, jobs, workers, note):
    import concurrent.futures

    text = "".join(SUMMARY_AUDIT.replace('"cells"', f'"cells{i}"', 1) for i in range(3))
    repo = _repo(tmp_path, text)
    monkeypatch.setattr(os, "process_cpu_count", lambda: cores, raising=False)  # the core count
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: set(range(cores)), raising=False)
    monkeypatch.setattr(os, "cpu_count", lambda: cores)
    monkeypatch.setattr(concurrent.futures, "ProcessPoolExecutor", _Pool)
    _Pool.started = []
    code, out, err = _main(["run", "audits.toml", "--jobs", str(jobs)], repo, monkeypatch, capsys)
    assert code == 0, out + err
    assert _Pool.started == ([] if workers is None else [workers])
    if note is None:
        assert err == ""
    else:
        assert err.splitlines() == [f"twoway-audit: note: {note}"]
    assert out.count("pass  cells") == 3


def test_jobs_cap_as_a_subprocess(tmp_path):
    # the real core count: --jobs far above it is lowered with one note, and the run still passes
    text = "".join(SUMMARY_AUDIT.replace('"cells"', f'"cells{i}"', 1) for i in range(2))
    repo = _repo(tmp_path, text)
    from audit.runner import available_cores

    r = subprocess.run([sys.executable, "-m", "audit", "run", "audits.toml", "--jobs", "1000"], cwd=repo,
                       env=dict(os.environ, PYTHONPATH=ROOT), capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stdout + r.stderr
    err = r.stderr.splitlines()
    assert len(err) == 1 and err[0].startswith(f"twoway-audit: note: --jobs 1000 lowered to {min(2, available_cores())} ("), err


def test_cache_folder_given_as_an_output_file_is_refused_before_any_audit_runs(tmp_path, monkeypatch, capsys):
    # before: every audit ran and the cache was filled, then --json failed on the cache folder
    repo = _repo(tmp_path, SUMMARY_AUDIT)
    code, out, err = _main(["run", "audits.toml", "--cache", "c", "--json", "c"], repo, monkeypatch, capsys)
    assert code == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "--cache 'c' is also given to --json" in lines[0], lines
    assert not (repo / "c").exists()
