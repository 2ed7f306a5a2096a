"""Bad-input corpus for the paths added since the last reliability round: each case is
generated here, run as a user runs it (``python -m audit ...`` in a fresh process), and
reported with its exit status, wall time, peak memory and the first line of standard
error, against what the case expects.

    python benchmarks/corpus_new_paths.py [--heavy] [--only SUBSTRING]

``--heavy`` adds the 150 x 150 design (about 30-60 s, under 1 GB expected). The data are
invented (seedling trials, bakery batches); the expected outcomes are the project's rules
(README): exit 2 with exactly one line for refused input, a verdict's exit status (0, 1 or
3) otherwise, every input file unchanged. The suite holds a fast test for each case; this
script is the outside view (time and memory of the real command).
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
ENV = {**os.environ, "PYTHONPATH": ROOT + os.pathsep + os.environ.get("PYTHONPATH", "")}


@dataclass
class Case:
    name: str
    args: list
    expect: str          # 'refused' (exit 2, one line), 'verdict' (exit 0/1/3), or 'exit N'
    limit_s: float = 60.0
    limit_mb: float = 1024.0
    check: object = None  # callable(stdout, stderr, folder) -> str or None (a problem)


def raw_csv(path, *, J=3, K=2, n=4, sd=1.0, scale=1.0, seed=1, fmt="{:.6g}", header=None):
    rng = np.random.default_rng(seed)
    lines = [header or "tray,light,height"]
    for j in range(J):
        for k in range(K):
            for _ in range(n):
                v = (10 + 2 * j + 3 * k + 1.5 * (j == 1) * (k == 1) + rng.normal(0, sd)) * scale
                lines.append(f"t{j},l{k},{fmt.format(v)}")
    with open(path, "w") as f:
        f.write("\n".join(lines) + "\n")
    return path


def summary_csv(path, *, scale=1.0, n=12, levels=("1", "2"), sd_scale=None):
    rows = ["dose,feed,mean,sd,n"]
    means = [[10.2, 11.9], [12.4, 15.8]]
    sds = [[1.9, 2.2], [2.1, 1.7]]
    for j, a in enumerate(levels):
        for k, b in enumerate(("wet", "dry")):
            rows.append(f"{a},{b},{means[j][k] * scale:.4g},{sds[j][k] * (sd_scale or scale):.3g},{n}")
    with open(path, "w") as f:
        f.write("\n".join(rows) + "\n")
    return path


def sha(path):
    with open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


def run(args, cwd):
    """Run the command; (exit status, stdout, stderr, wall seconds, the child's peak RSS in MB)."""
    t0 = time.perf_counter()
    with tempfile.TemporaryFile("w+") as out, tempfile.TemporaryFile("w+") as err:
        p = subprocess.Popen([sys.executable, "-m", "audit", *args], cwd=cwd, env=ENV, stdout=out, stderr=err,
                             text=True)
        _pid, status, usage = os.wait4(p.pid, 0)
        p.returncode = os.waitstatus_to_exitcode(status)
        wall = time.perf_counter() - t0
        out.seek(0)
        err.seek(0)
        return p.returncode, out.read(), err.read(), wall, usage.ru_maxrss / 1024


def cases(t: str, heavy: bool) -> list[Case]:
    cs: list[Case] = []
    data = raw_csv(os.path.join(t, "seedlings.csv"))
    base = ["check", data, "--response", "height", "--factors", "tray", "light", "--resamples", "499", "--seed", "1"]

    # report folders that hold a user's file
    for name, content in (("report.md", "# my notes\n"), ("findings.json", "{\"mine\": true}\n")):
        d = os.path.join(t, f"user_{name.split('.')[0]}")
        os.makedirs(d, exist_ok=True)
        with open(os.path.join(d, name), "w") as f:
            f.write(content)
        digest = sha(os.path.join(d, name))

        def keep(out, err, folder, d=d, name=name, digest=digest):
            files = sorted(os.listdir(d))
            if files != [name] or sha(os.path.join(d, name)) != digest:
                return f"folder changed: {files}"
        cs.append(Case(f"--report into a folder holding only {name}", [*base, "--report", d], "refused", check=keep))

    # summary mode at extreme magnitudes
    for k in (300, -300):
        s = summary_csv(os.path.join(t, f"sum_{k}.csv"), scale=10.0 ** k)
        cs.append(Case(f"summary table, means and SDs x 1e{k}", ["check-summary", s, "--factors", "dose", "feed",
                                                                  "--mean", "mean", "--sd", "sd", "--n", "n"],
                       "verdict"))
    for n in ("1e15", "1e300", "1000000000000000"):
        s = os.path.join(t, f"sum_n_{n}.csv")
        summary_csv(s)
        txt = open(s).read().replace(",12\n", f",{n}\n")
        open(s, "w").write(txt)
        cs.append(Case(f"summary table, n = {n}", ["check-summary", s, "--factors", "dose", "feed", "--mean", "mean",
                                                   "--sd", "sd", "--n", "n"], "refused"))
    s = summary_csv(os.path.join(t, "sum_levels.csv"), levels=("1", "2"))
    txt = open(s).read().splitlines()
    txt[2] = txt[2].replace("1,", "1.0,", 1)       # 1 x wet, 1.0 x dry, 2 x wet, 2 x dry
    open(s, "w").write("\n".join(txt) + "\n")

    def merged(out, err, folder):
        j = json.loads(out)
        levels = j["design"]["levels_a"] if "levels_a" in j["design"] else None
        notes = " ".join(j["design"].get("notes", []))
        if "merged" not in notes:
            return f"no merge note ({levels})"
    cs.append(Case("summary levels 1, 1.0 and 2", ["check-summary", s, "--factors", "dose", "feed", "--mean", "mean",
                                                    "--sd", "sd", "--n", "n", "--json", "-"], "verdict", check=merged))

    # runaways
    for noise in (1e-6, 1e-7, 1e-9):
        p = raw_csv(os.path.join(t, f"quiet_{noise:g}.csv"), J=3, K=3, n=5, sd=noise, fmt="{:.17g}")
        cs.append(Case(f"45 rows, within-cell SD {noise:g} of the cell differences",
                       ["check", p, "--response", "height", "--factors", "tray", "light"], "verdict", limit_s=5.0))
    # claims too long for one command-line argument (the system allows 128 KiB) come from a declared audit
    os.makedirs(os.path.join(t, "repo", ".git"), exist_ok=True)
    os.makedirs(os.path.join(t, "repo", "data"), exist_ok=True)
    raw_csv(os.path.join(t, "repo", "data", "raw.csv"))
    with open(os.path.join(t, "repo", "huge.toml"), "w") as f:
        f.write('[[audit]]\nname = "raw"\ndata = "data/raw.csv"\nresponse = "height"\nfactors = ["tray", "light"]\n'
                'claim = "F(2, 18) = 4.1, p = 2e-' + "9" * 99_999_999 + '"\n')
    cs.append(Case("claim p = 2e-99999999 (declared audit)", ["run", "huge.toml"], "refused", limit_s=20.0))
    for what, claim in (("F = 1e999", "F(2, 18) = 1e999, p < .001"), ("df1 = 1e999", "F(1e999, 18) = 4.1, p = .03")):
        cs.append(Case(f"claim with {what}", [*base, "--claim", claim], "refused"))
    long_claim = "F(2, 18) = 4.1, p = .03 " + "x" * 320_000

    def short(out, err, folder):
        if max(len(x) for x in err.splitlines()) > 1000:
            return f"error line of {max(len(x) for x in err.splitlines())} characters"
    with open(os.path.join(t, "repo", "long.toml"), "w") as f:
        f.write('[[audit]]\nname = "raw"\ndata = "data/raw.csv"\nresponse = "height"\nfactors = ["tray", "light"]\n'
                f'claim = "{long_claim}"\n')
    cs.append(Case("claim of 320,000 characters (declared audit)", ["run", "long.toml"], "refused", check=short))
    cs.append(Case("claim of 100,000 characters", [*base, "--claim", long_claim[:100_000]], "refused", check=short))
    rep = os.path.join(t, "rep_header.csv")
    txt = open(data).read().splitlines()
    open(rep, "w").write("\n".join(txt[:10] + txt[:1] + txt[10:]) + "\n")

    def names_header(out, err, folder):
        if "header" not in err:
            return "the error does not name the repeated header"
    cs.append(Case("a repeated header line inside the data", ["check", rep, "--response", "height", "--factors", "tray", "light"],
                   "refused", check=names_header))
    lab = os.path.join(t, "labels.csv")
    open(lab, "w").write("\n".join(["tray,light,height"] + [f"t{i % 3},l{i % 2},{'tall' if i % 4 else 'short'}"
                                                            for i in range(24)]) + "\n")

    def names_label(out, err, folder):
        if "label" not in err and "text" not in err:
            return "the error does not say the column holds text"
    cs.append(Case("a response column of text labels", ["check", lab, "--response", "height", "--factors", "tray", "light"],
                   "refused", check=names_label))

    # the DuckDB engine against the memory engine
    try:
        import duckdb  # noqa: F401
        has_duckdb = True
    except ImportError:
        has_duckdb = False
    if has_duckdb:
        import pandas as pd

        b = os.path.join(t, "bool.parquet")
        pd.DataFrame({"tray": [f"t{i % 3}" for i in range(24)], "light": [f"l{i % 2}" for i in range(24)],
                      "height": [i % 2 == 0 for i in range(24)]}).to_parquet(b, index=False)
        cs.append(Case("DuckDB: boolean response", ["check", b, "--response", "height", "--factors", "tray", "light",
                                                    "--engine", "duckdb"], "refused"))
        for k in (306, -311):   # responses around 1e307 and 1e-310 (the cell means are 10 to 16)
            p = raw_csv(os.path.join(t, f"big_{k}.csv"), scale=10.0 ** k, fmt="{:.17g}")
            for eng in ("memory", "duckdb"):
                cs.append(Case(f"{eng}: response around 1e{k + 1}", ["check", p, "--response", "height", "--factors", "tray", "light",
                                                             "--engine", eng, "--resamples", "0", "--json", "-"],
                               "verdict"))
        odd = raw_csv(os.path.join(t, "e_odd[1].csv"))
        cs.append(Case("DuckDB: file named e_odd[1].csv", ["check", odd, "--response", "height", "--factors", "tray", "light",
                                                           "--engine", "duckdb", "--resamples", "0"], "verdict"))
        dup = os.path.join(t, "dup.csv")
        txt = open(data).read().replace("tray,light,height", "tray,tray,height")
        open(dup, "w").write(txt)
        cs.append(Case("DuckDB: a duplicated column name", ["check", dup, "--response", "height", "--factors", "tray", "light",
                                                            "--engine", "duckdb"], "refused"))
        us = os.path.join(t, "underscore.csv")
        txt = open(data).read().splitlines()
        txt[3] = txt[3].rsplit(",", 1)[0] + ",1_000"
        open(us, "w").write("\n".join(txt) + "\n")
        cs.append(Case("DuckDB: a response written 1_000", ["check", us, "--response", "height", "--factors", "tray", "light",
                                                            "--engine", "duckdb"], "refused"))
        u16 = os.path.join(t, "utf16.csv")
        open(u16, "w", encoding="utf-16").write(open(data).read())
        cs.append(Case("DuckDB: UTF-16 with a BOM", ["check", u16, "--response", "height", "--factors", "tray", "light",
                                                     "--engine", "duckdb", "--resamples", "0"], "verdict"))
        semi = os.path.join(t, "semi.csv")
        open(semi, "w", encoding="latin-1").write(open(data).read().replace(",", ";").replace(".", ",")
                                                  .replace("tray", "bac\u00e9"))
        cs.append(Case("DuckDB: --decimal , and --encoding latin-1",
                       ["check", semi, "--response", "height", "--factors", "bac\u00e9", "light", "--engine", "duckdb",
                        "--decimal", ",", "--encoding", "latin-1", "--resamples", "0"], "verdict"))
        sp = os.path.join(t, "spell.csv")
        txt = open(data).read().splitlines()
        txt = [txt[0]] + [ln.replace(",l0,", ",15,").replace(",l1,", ",20,") for ln in txt[1:]]
        txt[2] = txt[2].replace(",15,", ",15.0,")
        open(sp, "w").write("\n".join(txt) + "\n")

        def merged_engine(out, err, folder):
            j = json.loads(out)
            if "merged" not in " ".join(j["design"].get("notes", [])):
                return "no merge note"
        cs.append(Case("DuckDB: levels 15 and 15.0", ["check", sp, "--response", "height", "--factors", "tray", "light",
                                                      "--engine", "duckdb", "--resamples", "0", "--json", "-"],
                       "verdict", check=merged_engine))

    # run mode
    repo = os.path.join(t, "repo")
    os.makedirs(os.path.join(repo, "data"), exist_ok=True)
    os.makedirs(os.path.join(repo, ".git"), exist_ok=True)
    summary_csv(os.path.join(repo, "data", "cells.csv"))
    raw_csv(os.path.join(repo, "data", "raw.csv"))
    with open(os.path.join(repo, "levels.toml"), "w") as f:
        f.write('[[audit]]\nname = "cells"\nsummary = "data/cells.csv"\nfactors = ["dose", "feed"]\n'
                'mean = "mean"\nsd = "sd"\nn = "n"\nlevels = { dose = ["2", "1"] }\n')
    cs.append(Case("run: levels on a summary audit", ["run", "levels.toml"], "refused"))
    bad = os.path.join(repo, "data", "bad.csv")
    txt = open(os.path.join(repo, "data", "cells.csv")).read().splitlines()
    txt[4] = txt[4].replace(",12", ",twelve")
    open(bad, "w").write("\n".join(txt) + "\n")
    with open(os.path.join(repo, "line.toml"), "w") as f:
        f.write('[[audit]]\nname = "cells"\nsummary = "data/bad.csv"\nfactors = ["dose", "feed"]\n'
                'mean = "mean"\nsd = "sd"\nn = "n"\n')

    def line5(out, err, folder):
        if "5" not in err:
            return "the error does not name file line 5"
    cs.append(Case("run: a bad value on file line 5 of a cell table", ["run", "line.toml"], "refused", check=line5))
    with open(os.path.join(repo, "main.toml"), "w") as f:
        f.write('[[audit]]\nname = "cells"\nsummary = "data/cells.csv"\nfactors = ["dose", "feed"]\n'
                'mean = "mean"\nsd = "sd"\nn = "n"\nclaim = ["dose: F(1, 44) = 99.0, p < .001"]\n')
    cs.append(Case("run: only a main-effect claim, not reproducible", ["run", "main.toml"], "exit 1"))
    with open(os.path.join(repo, "jobs.toml"), "w") as f:
        for i in range(3):
            f.write(f'[[audit]]\nname = "raw{i}"\ndata = "data/raw.csv"\nresponse = "height"\n'
                    f'factors = ["tray", "light"]\nresamples = 199\n')

    def capped(out, err, folder):
        if "lowered" not in err:
            return "no note that --jobs was lowered"
    cs.append(Case("run: --jobs 16 on this machine", ["run", "jobs.toml", "--jobs", "16"], "verdict", check=capped))
    for c in cs:
        if c.args and c.args[0] == "run":
            c.cwd = os.path.join(t, "repo") if c.args[1] in ("huge.toml", "long.toml") else repo
    if heavy:
        big = os.path.join(t, "grid150.csv")
        rng = np.random.default_rng(5)
        with open(big, "w") as f:
            f.write("plot,strain,mass\n")
            for j in range(150):
                for k in range(150):
                    for _ in range(2):
                        f.write(f"p{j},s{k},{5 + 0.01 * j + 0.02 * k + rng.normal(0, 1):.4f}\n")
        cs.append(Case("150 x 150 design, n = 2", ["check", big, "--response", "mass", "--factors", "plot", "strain"],
                       "verdict", limit_s=60.0, limit_mb=1024.0))
    return cs


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--heavy", action="store_true")
    ap.add_argument("--only", default=None)
    a = ap.parse_args(argv)
    bad = 0
    with tempfile.TemporaryDirectory() as t:
        cs = cases(t, a.heavy)
        inputs = {}
        for root, _dirs, files in os.walk(t):
            for fn in files:
                inputs[os.path.join(root, fn)] = sha(os.path.join(root, fn))
        print("| case | expected | exit | seconds | peak MB | outcome | first line of stderr |")
        print("|---|---|---|---|---|---|---|")
        for c in cs:
            if a.only and a.only not in c.name:
                continue
            code, out, err, wall, mb = run(c.args, getattr(c, "cwd", t))
            lines = [x for x in err.splitlines() if x.strip()]
            problems = []
            if "Traceback" in err:
                problems.append("traceback")
            if c.expect == "refused" and (code != 2 or len(lines) != 1):
                problems.append(f"expected exit 2 and one line, got {code} and {len(lines)} line(s)")
            if c.expect == "verdict" and code not in (0, 1, 3):
                problems.append(f"expected a verdict's exit status, got {code}")
            if c.expect.startswith("exit ") and code != int(c.expect.split()[1]):
                problems.append(f"expected {c.expect}, got {code}")
            if wall > c.limit_s:
                problems.append(f"took {wall:.1f} s (limit {c.limit_s:g})")
            if mb > c.limit_mb:
                problems.append(f"{mb:.0f} MB (limit {c.limit_mb:g})")
            if c.check is not None and not problems:
                got = c.check(out, err, t)
                if got:
                    problems.append(got)
            first = (lines[0] if lines else "")[:140].replace("|", "/")
            outcome = "clean" if not problems else "; ".join(problems)
            bad += bool(problems)
            ms = f"{mb:.0f}"
            print(f"| {c.name} | {c.expect} | {code} | {wall:.1f} | {ms} | {outcome} | {first} |", flush=True)
        changed = [p for p, h in inputs.items() if os.path.exists(p) and sha(p) != h]
        print(f"\ninputs changed: {len(changed)} of {len(inputs)}" + (f" ({changed})" if changed else ""))
        bad += bool(changed)
    print(f"cases with a problem: {bad}")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
