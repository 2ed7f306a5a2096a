"""The bundled demonstration: the full audit on four invented datasets, each built so that
its truth is known and the verdict it should get is fixed in advance.

The CSV files ship inside the package (``audit/demo_data/``); they are written by the
seeded generator ``fixtures/make_demo.py`` (a test checks that the shipped files equal
its output).  :func:`run_demo` audits them with a fixed seed and a modest number of
resamples, so a run takes seconds and always gives the same results.
"""

from __future__ import annotations

import contextlib
import importlib.resources
import warnings
from dataclasses import dataclass

__all__ = ["DemoDataset", "DEMO_DATASETS", "DEMO_SEED", "DEMO_RESAMPLES", "DemoResult", "demo_file", "run_demo",
           "terminal_lines"]

#: seed of every resampling method and of the size check in the demo
DEMO_SEED = 20_251
#: resamples per permutation / bootstrap method in the demo (enough for its decisions, fast)
DEMO_RESAMPLES = 1_999


@dataclass(frozen=True, kw_only=True)
class DemoDataset:
    """One bundled dataset: file name, response and factor columns, the invented
    scenario (one sentence) and the verdict it was built to show."""

    name: str
    response: str
    factors: tuple[str, str]
    scenario: str
    shows: str
    summary: bool = False   # a manuscript's table of cell statistics, claims in a JSON sidecar

    @property
    def file(self) -> str:
        return f"{self.name}.csv"


DEMO_DATASETS: tuple[DemoDataset, ...] = (
    DemoDataset(
        name="greenhouse_tomato", response="yield_kg", factors=("variety", "irrigation"),
        scenario="A greenhouse trial: three tomato varieties under drip or sprinkler irrigation, ten plants "
                 "per cell; each variety prefers a different watering (a clean crossover).",
        shows="holds"),
    DemoDataset(
        name="enzyme_activity", response="activity_u_ml", factors=("temperature", "substrate"),
        scenario="An assay of enzyme activity at three temperatures and three substrate levels, where the two "
                 "effects multiply: the interaction on the raw scale vanishes on the log scale.",
        shows="holds-with-caveats"),
    DemoDataset(
        name="reading_programme", response="score_gain", factors=("programme", "term"),
        scenario="Reading-score gains of pupils in two programmes over two school terms; a small interaction "
                 "sits just below alpha, and deleting a single pupil's score takes it back above.",
        shows="fragile"),
    DemoDataset(
        name="coating_adhesion", response="adhesion_mpa", factors=("primer", "cure"),
        scenario="Adhesion strength of two primers cured at three temperatures; no true interaction, but the "
                 "smallest cells are by far the noisiest and the classical F rejects.",
        shows="does-not-hold"),
    DemoDataset(
        name="manuscript_sleep_caffeine", response="restedness", factors=("programme", "caffeine"),
        scenario="A manuscript's table of cell means, SDs and sizes (sleep-hygiene programme x evening "
                 "caffeine, restedness rated 1-7) with its reported tests: the interaction line cannot come "
                 "from the table (reviewed with check-summary, no raw data).",
        shows="not-reproducible", summary=True),
)


@dataclass(frozen=True, kw_only=True)
class DemoResult:
    dataset: DemoDataset
    findings: object  # audit.findings.Findings

    @property
    def verdict(self) -> str | None:
        return self.findings.verdict

    @property
    def as_built(self) -> bool:
        return self.verdict == self.dataset.shows


@contextlib.contextmanager
def demo_file(dataset: DemoDataset):
    """The path of a bundled dataset's CSV (a real file for as long as the context lasts)."""
    ref = importlib.resources.files("audit").joinpath("demo_data", dataset.file)
    with importlib.resources.as_file(ref) as path:
        yield str(path)


def run_demo(*, resamples: int = DEMO_RESAMPLES, seed: int = DEMO_SEED, figures: bool = False,
             timestamp: bool = True):
    """Audit every bundled dataset; yields a :class:`DemoResult` per dataset, in order."""
    from .api import check

    for ds in DEMO_DATASETS:
        with demo_file(ds) as path, warnings.catch_warnings():
            warnings.filterwarnings("ignore", category=RuntimeWarning)
            if ds.summary:
                f = _check_manuscript(path, seed=seed, figures=figures, timestamp=timestamp)
            else:
                f = check(path, response=ds.response, factors=ds.factors, resamples=resamples, seed=seed,
                          figures=figures, timestamp=timestamp)
        yield DemoResult(dataset=ds, findings=f)


def _check_manuscript(path: str, *, seed: int, figures: bool, timestamp: bool):
    """Review a bundled manuscript table with the claims and scale of its JSON sidecar."""
    import json

    from .api import check_summary

    with open(path[:-4] + ".json", encoding="utf-8") as fh:
        side = json.load(fh)
    scale = side.get("scale") or {}
    return check_summary(path, factors=tuple(side["factors"]), mean=side["mean"], sd=side["sd"], n=side["n"],
                         response=side.get("response", "y"), claim=side["claims"], seed=seed, figures=figures,
                         timestamp=timestamp, scale_items=scale.get("items"), scale_min=scale.get("min"),
                         scale_max=scale.get("max"))


def terminal_lines(findings) -> list[str]:
    """The audit's terminal summary (the same lines ``check`` prints)."""
    from .render.terminal import render_terminal
    from .report import build_report

    return render_terminal(build_report(findings)).rstrip("\n").splitlines()
