"""`twoway-audit run`: declared audits, exit status, JUnit XML, Markdown, combined JSON, --jobs, --cache.

The JUnit checks read the file with xml.etree against the structure CI systems read:
testsuites > testsuite > testcase > failure/error, with tests/failures/errors counts.
# reference: the JUnit XML format (the report layout of the JUnit test runner's Ant task,
# as read by CI services: testsuite attributes tests, failures, errors, time; a testcase holds
# a <failure message= type=> or <error> element when it does not pass).
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import sys
import xml.etree.ElementTree as ET

import pytest

from conftest import FIXTURES, ROOT

EXAMPLE = os.path.join(FIXTURES, "example-repo")


def _cli(args, cwd, timeout=180):
    env = {**os.environ, "PYTHONPATH": ROOT}
    return subprocess.run([sys.executable, "-m", "audit", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=timeout)


def _main(args, cwd, monkeypatch, capsys):
    from audit.cli import main

    monkeypatch.chdir(cwd)
    code = main(args)
    out = capsys.readouterr()
    return code, out.out, out.err


def _digest(folder):
    out = {}
    for base, _, files in os.walk(folder):
        for f in files:
            p = os.path.join(base, f)
            with open(p, "rb") as fh:
                out[os.path.relpath(p, folder)] = (hashlib.sha256(fh.read()).hexdigest(), os.stat(p).st_mtime_ns)
    return out


def _junit(path):
    root = ET.parse(path).getroot()
    assert root.tag == "testsuites"
    suites = root.findall("testsuite")
    assert len(suites) == 1
    cases = suites[0].findall("testcase")
    failing = [c.get("name") for c in cases if c.find("failure") is not None]
    errors = [c.get("name") for c in cases if c.find("error") is not None]
    for el in (root, suites[0]):   # counts agree with the test cases
        assert int(el.get("tests")) == len(cases)
        assert int(el.get("failures")) == len(failing)
        assert int(el.get("errors")) == len(errors)
        assert float(el.get("time")) >= 0
    return cases, failing, errors


def _copy_example(tmp_path):
    repo = tmp_path / "repo"
    shutil.copytree(EXAMPLE, repo)
    return repo


# ---------------------------------------------------------------------------- the example repository


def test_example_repo_fails_exactly_the_contradicted_audit_then_passes_when_corrected(tmp_path):
    before = _digest(EXAMPLE)
    junit = tmp_path / "results.xml"
    r = _cli(["run", "--junit", str(junit), "--markdown", str(tmp_path / "summary.md"),
              "--json", str(tmp_path / "all.json")], cwd=EXAMPLE)
    assert r.returncode == 1, r.stderr
    assert r.stderr == ""
    lines = r.stdout.splitlines()
    assert lines[0].startswith("pass  rise-height: holds - ")
    assert lines[1].startswith("FAIL  crumb-acidity: does-not-hold - ")
    assert lines[2].startswith("pass  loaf-volume: holds - ")
    cases, failing, errors = _junit(junit)
    assert [c.get("name") for c in cases] == ["rise-height", "crumb-acidity", "loaf-volume"]
    assert failing == ["crumb-acidity"] and errors == []
    fl = cases[1].find("failure")
    assert fl.get("type") == "does-not-hold" and fl.get("message").startswith("does-not-hold: ")
    assert "contradicts the claim" in fl.text
    md = (tmp_path / "summary.md").read_text("utf-8")
    assert "1 of 3 audits failed" in md and "| crumb-acidity | **fail** | `does-not-hold` |" in md
    doc = json.loads((tmp_path / "all.json").read_text("utf-8"))
    assert list(doc["audits"]) == ["rise-height", "crumb-acidity", "loaf-volume"]
    assert doc["audits"]["crumb-acidity"]["failed"] is True and doc["exit_status"] == 1
    assert _digest(EXAMPLE) == before  # the repository is never written

    repo = _copy_example(tmp_path)
    cfg = repo / "pyproject.toml"
    text = cfg.read_text("utf-8")
    cfg.write_text(text.replace('claim = "present"', 'claim = "absent"'), "utf-8")
    junit2 = tmp_path / "results2.xml"
    r = _cli(["run", "--junit", str(junit2)], cwd=repo)
    assert r.returncode == 0, r.stdout + r.stderr
    assert "crumb-acidity: holds" in r.stdout
    _, failing, errors = _junit(junit2)
    assert failing == [] and errors == []


# ---------------------------------------------------------------------------- malformed configurations

GOOD_AUDIT = """
[[audit]]
name = "rise"
data = "data/rise_height.csv"
response = "rise_mm"
factors = ["starter", "proof_temp"]
resamples = 99
calibration = 0
"""

MALFORMED = {
    # case: (text, audit named, key named)
    "bad-toml": (GOOD_AUDIT.replace('response = "rise_mm"', "response = rise_mm"), "rise", "response"),
    "unknown-key": (GOOD_AUDIT.replace("resamples = 99", "resampels = 99"), "rise", "resampels"),
    "missing-file": (GOOD_AUDIT.replace("rise_height.csv", "rise_hieght.csv"), "rise", "data"),
    "escaping-path": (GOOD_AUDIT.replace("data/rise_height.csv", "../outside.csv"), "rise", "data"),
    "unparseable-claim": (GOOD_AUDIT + 'claim = "F(2, 42) = lots, p = maybe"\n', "rise", "claim"),
}


@pytest.mark.parametrize("case", sorted(MALFORMED))
def test_malformed_config_exits_2_naming_file_audit_and_key(tmp_path, case):
    repo = _copy_example(tmp_path)
    (tmp_path / "outside.csv").write_bytes((repo / "data" / "rise_height.csv").read_bytes())
    text, audit_name, key = MALFORMED[case]
    (repo / "audits.toml").write_text(text, "utf-8")
    r = _cli(["run", "audits.toml", "--junit", str(tmp_path / "j.xml")], cwd=repo, timeout=60)
    assert r.returncode == 2, (case, r.stdout, r.stderr)
    err = r.stderr.strip().splitlines()
    assert len(err) == 1, err
    assert err[0].startswith("twoway-audit: error: audits.toml: ")
    assert f"audit {audit_name!r}" in err[0] and f"key {key!r}" in err[0], err[0]
    assert r.stdout == ""
    assert not (tmp_path / "j.xml").exists()


@pytest.mark.parametrize("text,key", [
    (GOOD_AUDIT.replace('name = "rise"\n', ""), "name"),
    (GOOD_AUDIT + 'summary = "data/loaf_volume_cells.csv"\n', "data"),
    (GOOD_AUDIT + 'fail_on = ["doesnt-hold"]\n', "fail_on"),
    (GOOD_AUDIT + 'mean = "mean_ml"\n', "mean"),
    (GOOD_AUDIT.replace("resamples = 99", "resamples = -1"), "resamples"),
    (GOOD_AUDIT.replace("resamples = 99", "alpha = 5"), "alpha"),
    (GOOD_AUDIT + 'levels = { flour = ["a", "b"] }\n', "levels.flour"),
    (GOOD_AUDIT.replace('["starter", "proof_temp"]', '["starter"]'), "factors"),
    (GOOD_AUDIT + GOOD_AUDIT, "name"),
    ('fail_on = []\nseeds = 3\n' + GOOD_AUDIT, "seeds"),
])
def test_config_errors_name_the_key(tmp_path, text, key):
    from audit.config import load_config
    from audit.errors import AuditInputError, ConfigError

    repo = _copy_example(tmp_path)
    (repo / "audits.toml").write_text(text, "utf-8")
    with pytest.raises(ConfigError) as e:
        load_config(repo / "audits.toml")
    assert isinstance(e.value, AuditInputError)
    assert e.value.key == key and f"key {key!r}" in str(e.value)
    assert str(e.value).startswith(str(repo / "audits.toml") + ": ")


def test_pyproject_without_table_and_missing_config(tmp_path, monkeypatch, capsys):
    (tmp_path / "pyproject.toml").write_text('[project]\nname = "x"\n', "utf-8")
    code, out, err = _main(["run"], tmp_path, monkeypatch, capsys)
    assert code == 2 and "pyproject.toml: key 'tool.twoway-audit'" in err
    os.remove(tmp_path / "pyproject.toml")
    code, out, err = _main(["run"], tmp_path, monkeypatch, capsys)
    assert code == 2 and "no pyproject.toml in the current folder" in err


def test_outputs_never_replace_an_input(tmp_path, monkeypatch, capsys):
    repo = _copy_example(tmp_path)
    before = _digest(repo)
    for opt, target in (("--json", "data/rise_height.csv"), ("--junit", "pyproject.toml"),
                        ("--cache", "data/loaf_volume_cells.csv")):
        code, out, err = _main(["run", opt, target], repo, monkeypatch, capsys)
        assert code == 2 and opt in err and out == ""
    assert _digest(repo) == before


# ---------------------------------------------------------------------------- determinism, jobs, cache

FAST = """
seed = 7
resamples = 199
calibration = 100

[[audit]]
name = "rise | height @team <b>x</b>"
data = "data/rise_height.csv"
response = "rise_mm"
factors = ["starter", "proof_temp"]
claim = "F(2, 42) = 31.80, p < .001"

[[audit]]
name = "crumb"
data = "data/crumb_acidity.csv"
response = "crumb_ph"
factors = ["flour", "ferment"]
claim = "absent"
fail_on = ["does-not-hold", "holds-with-caveats"]

[[audit]]
name = "volume"
summary = "data/loaf_volume_cells.csv"
factors = ["starter", "hydration"]
mean = "mean_ml"
sd = "sd_ml"
n = "loaves"
"""


def _fast_repo(tmp_path):
    repo = _copy_example(tmp_path)
    (repo / "audits.toml").write_text(FAST, "utf-8")
    return repo


def _outputs(repo, tmp_path, monkeypatch, capsys, tag, *extra):
    out = {k: tmp_path / f"{tag}.{k}" for k in ("json", "md", "xml")}
    code, stdout, err = _main(["run", "audits.toml", "--json", str(out["json"]), "--markdown", str(out["md"]),
                               "--junit", str(out["xml"]), *extra], repo, monkeypatch, capsys)
    return code, stdout, err, {k: v.read_bytes() for k, v in out.items()}


def test_reruns_jobs_and_cache_give_identical_results(tmp_path, monkeypatch, capsys):
    repo = _fast_repo(tmp_path)
    cache = tmp_path / "cache"
    c1, s1, e1, o1 = _outputs(repo, tmp_path, monkeypatch, capsys, "one")
    c2, s2, e2, o2 = _outputs(repo, tmp_path, monkeypatch, capsys, "two", "--jobs", "2")
    c3, s3, e3, o3 = _outputs(repo, tmp_path, monkeypatch, capsys, "three", "--cache", str(cache))
    c4, s4, e4, o4 = _outputs(repo, tmp_path, monkeypatch, capsys, "four", "--cache", str(cache), "--jobs", "2")
    assert c1 == c2 == c3 == c4 == 1  # 'crumb' fails on its caveats by its own fail_on
    assert o1["json"] == o2["json"] == o3["json"] == o4["json"]
    assert o1["md"] == o2["md"] == o3["md"] == o4["md"]
    assert s1 == s2 == s3 and "(cached)" not in s3
    assert s4.count("(cached)") == 3 and s4.replace(" (cached)", "") == s1
    _, failing, _ = _junit(tmp_path / "four.xml")
    assert failing == ["crumb"]
    doc = json.loads(o1["json"])
    for name, a in doc["audits"].items():
        prov = a["findings"]["provenance"]
        assert "timestamp" not in prov and prov["command"] is None
        assert not os.path.isabs(prov["input"]) and prov["input"].startswith("data/")
        assert prov["seed"] == 7 and len(prov["input_sha256"]) == 64
    # strict JSON and the published schema for every audit's findings
    from conftest import strict_json_check
    import jsonschema
    from audit.findings import findings_schema

    for a in doc["audits"].values():
        strict_json_check(a["findings"])
        jsonschema.validate(a["findings"], findings_schema())
    # a changed input is audited again (its key changes); the others stay cached
    with open(repo / "data" / "crumb_acidity.csv", "a", encoding="utf-8") as fh:
        fh.write("white,12h,4.61\n")
    c5, s5, _, o5 = _outputs(repo, tmp_path, monkeypatch, capsys, "five", "--cache", str(cache))
    assert s5.count("(cached)") == 2 and "crumb: " in s5 and "crumb: holds-with-caveats (cached)" not in s5
    assert json.loads(o5["json"])["audits"]["crumb"]["findings"]["design"]["n"] == 61
    # a damaged cache entry is ignored and rewritten
    for f in os.listdir(cache):
        (cache / f).write_text("{not json", "utf-8")
    c6, s6, _, o6 = _outputs(repo, tmp_path, monkeypatch, capsys, "six", "--cache", str(cache))
    assert "(cached)" not in s6 and o6["json"] == o5["json"]


def test_markdown_and_junit_escape_user_strings(tmp_path, monkeypatch, capsys):
    repo = _fast_repo(tmp_path)
    code, stdout, err, o = _outputs(repo, tmp_path, monkeypatch, capsys, "esc")
    md = o["md"].decode("utf-8")
    row = [ln for ln in md.splitlines() if ln.startswith("| rise")][0]
    assert "rise \\| height &#64;team &lt;b&gt;x&lt;/b&gt;" in row
    assert row.count(" | ") == 3 + 0  # the escaped pipe does not add a column
    assert "<b>" not in md and "@team" not in md
    cases, _, _ = _junit(tmp_path / "esc.xml")
    assert cases[0].get("name") == "rise | height @team <b>x</b>"


def test_runtime_input_error_is_an_error_case_and_exit_2(tmp_path, monkeypatch, capsys):
    repo = _fast_repo(tmp_path)
    (repo / "audits.toml").write_text(FAST.replace('response = "crumb_ph"', 'response = "crumb_pH"'), "utf-8")
    code, stdout, err, o = _outputs(repo, tmp_path, monkeypatch, capsys, "err")
    assert code == 2
    assert "ERROR crumb: could not run" in stdout
    assert "audits.toml: audit 'crumb': " in err and "crumb_pH" in err
    cases, failing, errors = _junit(tmp_path / "err.xml")
    assert errors == ["crumb"]
    assert json.loads(o["json"])["audits"]["crumb"]["error"]


def test_standalone_file_shared_settings_and_levels(tmp_path):
    from audit.config import load_config

    repo = _fast_repo(tmp_path)
    text = FAST + '\n[[audit]]\nname = "ordered"\ndata = "data/rise_height.csv"\nresponse = "rise_mm"\n' \
                  'factors = ["starter", "proof_temp"]\nlevels = { proof_temp = ["26C", "18C"] }\nseed = 3\n'
    (repo / "audits.toml").write_text(text, "utf-8")
    cfg = load_config(repo / "audits.toml")
    a = {s.name: s for s in cfg.audits}
    assert a["crumb"].seed == 7 and a["crumb"].resamples == 199 and a["crumb"].calibration == 100
    assert a["volume"].resamples is None and a["volume"].kind == "summary"
    assert a["ordered"].seed == 3 and a["ordered"].levels == (("proof_temp", ("26C", "18C")),)
    assert a["crumb"].fail_on == ("does-not-hold", "holds-with-caveats")
    assert a["volume"].fail_on == ("does-not-hold", "not-reproducible", "fragile")


def test_config_constants_match_the_library():
    from audit import config
    from audit.api import MAX_CALIBRATION
    from audit.verdict.conclude import VERDICTS

    assert config.VERDICTS == VERDICTS and config._MAX_CALIBRATION == MAX_CALIBRATION


def test_fully_cached_run_loads_no_numerical_module_and_bad_claim_still_exits_2(tmp_path):
    repo = _fast_repo(tmp_path)
    cache = str(tmp_path / "cache")
    code = ("import sys; from audit.cli import main; c = main(['run', 'audits.toml', '--cache', %r]); "
            "print('numerical:', sorted(m for m in ('numpy', 'scipy', 'pandas') if m in sys.modules)); "
            "sys.exit(c)" % cache)
    env = {**os.environ, "PYTHONPATH": ROOT}
    first = subprocess.run([sys.executable, "-c", code], cwd=repo, env=env, capture_output=True, text=True)
    again = subprocess.run([sys.executable, "-c", code], cwd=repo, env=env, capture_output=True, text=True)
    assert first.returncode == again.returncode == 1, first.stderr + again.stderr
    assert "(cached)" not in first.stdout and again.stdout.count("(cached)") == 3
    assert "numerical: []" in again.stdout
    # a claim that cannot be read is a configuration error with a cache too (that audit is not cached)
    text = (repo / "audits.toml").read_text("utf-8").replace('claim = "absent"', 'claim = "absent-ish"')
    (repo / "audits.toml").write_text(text, "utf-8")
    r = _cli(["run", "audits.toml", "--cache", cache, "--json", str(tmp_path / "x.json")], cwd=repo)
    assert r.returncode == 2 and "audits.toml: audit 'crumb': key 'claim'" in r.stderr
    assert r.stdout == "" and not (tmp_path / "x.json").exists()
