"""The main job end to end: intake → blind claims → scorecard → report, and the shipped demo.

Each stage is a function of the Python API; the CLI verbs ``blind``, ``unmask``, ``run`` and ``demo`` are thin
shells over the functions here. Outputs are staged in a scratch folder and published only when the whole
stage succeeded (:class:`~siteproof.core.outputs.StagedOutput`), so an error never leaves partial results.
"""

from __future__ import annotations

import shutil
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Callable

import pandas as pd

from .blind.analysis import BlindConfig, run_blind
from .blind.claims import CLAIMS_FILE, UNITS_FILE, Claims, read_claims, write_claims
from .core.results import ResultsMixin
from .core.outputs import StagedOutput, atomic_write_json, atomic_write_text, check_out_dir
from .reporting.report import write_report
from .simulation.simulate import simulate, write_simulation
from .intake.study import Study, StudySpec, load_study
from .unmask.scoring import Scorecard, run_unmask

Tick = Callable[[str], None]
DEMO_SEED = 20261202
DEMO_DESIGNS = ("demo", "hidden_branch")
# what each demo scenario is built to show: unconfoundedness given X holds (the primary claim should be
# recovered) or is broken by a hidden branch effect (the primary claim should be caught as `different`)
DEMO_PURPOSE = {
    "demo": ("hold", "unconfoundedness given the covariates holds"),
    "hidden_branch": ("break", "a hidden branch effect that tracks the rate breaks unconfoundedness"),
}
DEMO_MARKER = ".siteproof-demo"


@dataclass(repr=False)
class PipelineResult(ResultsMixin):
    """What one run produced: the study, the claims, the scorecard and the folder written (None: nothing written).

    Its frame and summary are the scorecard's (one row per scored claim), or the claims' when nothing was unmasked.
    """

    study: Study
    claims: Claims
    scorecard: Scorecard | None
    out_dir: Path | None

    def _key_numbers(self) -> dict[str, object]:
        return {"n": self.study.n, "sites": self.study.n_sites, "claims": len(self.claims.to_frame()),
                "scored": None if self.scorecard is None else len(self.scorecard.to_frame()),
                "out_dir": None if self.out_dir is None else str(self.out_dir)}

    def to_frame(self) -> pd.DataFrame:
        return (self.claims if self.scorecard is None else self.scorecard).to_frame()


def blind_stage(
    spec: StudySpec, out_dir: Path | str, config: BlindConfig | None = None, *, force: bool = False,
    progress: Tick | None = None,
) -> tuple[Study, Claims]:
    """Intake and blind analysis; writes ``claims.json`` and ``units.parquet`` into ``out_dir``."""
    check_out_dir(out_dir, force)  # refuse before any work, not after it
    study = load_study(spec)
    with StagedOutput(out_dir, force) as staged:
        claims = run_blind(study, _config_for(spec, config), progress=progress)
        write_claims(claims, staged)
    return study, claims


def unmask_stage(
    spec: StudySpec, claims_dir: Path | str, out_dir: Path | str, *, margin: float | None = None,
    alpha: float | None = None, multiplicity: str | None = None, deviate_from_plan: bool = False,
    transport: bool = False, workers: int = 1, force: bool = False, report: bool = True,
) -> PipelineResult:
    """Unmask earlier claims against the sites' randomization; writes ``scorecard.json`` (and the report).

    The claims' locked plan fixes margin, alpha and multiplicity; other values need ``deviate_from_plan``."""
    check_out_dir(out_dir, force)
    study = load_study(spec)
    claims = read_claims(claims_dir)
    scorecard = run_unmask(
        study, claims, margin=_margin(spec, margin), alpha=alpha, multiplicity=multiplicity,
        deviate_from_plan=deviate_from_plan, seed=spec.seed, transport=transport, workers=workers,
    )
    with StagedOutput(out_dir, force) as staged:
        if Path(claims_dir).resolve() == Path(out_dir).resolve():  # the new folder keeps the claims it scores
            for name in (CLAIMS_FILE, UNITS_FILE):
                shutil.copy2(Path(claims_dir) / name, staged / name)
        _write_scorecard(staged, claims, scorecard, report)
    return PipelineResult(study, claims, scorecard, Path(out_dir))


def run_pipeline(
    spec: StudySpec, out_dir: Path | str | None = None, config: BlindConfig | None = None, *,
    margin: float | None = None, transport: bool = False, workers: int = 1, force: bool = False,
    report: bool = True, progress: Tick | None = None,
) -> PipelineResult:
    """Blind + unmask (+ report) in one go; with ``out_dir`` all outputs are published together at the end,
    without it nothing is written (the results stay in the returned objects).  ``margin`` (or the study's)
    goes into the blind stage's locked plan, so unmasking follows that plan without deviation."""
    if out_dir is not None:
        check_out_dir(out_dir, force)
    study = load_study(spec)
    claims = run_blind(study, _config_for(spec, config, margin), progress=progress)
    scorecard = run_unmask(study, claims, seed=spec.seed, transport=transport, workers=workers)
    if out_dir is None:
        return PipelineResult(study, claims, scorecard, None)
    with StagedOutput(out_dir, force) as staged:
        write_claims(claims, staged)
        _write_scorecard(staged, claims, scorecard, report)
    return PipelineResult(study, claims, scorecard, Path(out_dir))


def _write_scorecard(folder: Path, claims: Claims, scorecard: Scorecard, report: bool) -> None:
    """``scorecard.json`` and (when asked) the report, into ``folder``; files take the dict forms."""
    atomic_write_json(folder / "scorecard.json", scorecard.to_dict())
    if report:
        write_report(folder, claims, scorecard)


def write_demo_data(design: str, folder: Path) -> StudySpec:
    """Simulate a shipped design with the demo seed into ``folder`` (data CSV, truth CSV, study TOML) and
    return its study description, with the declared coaching shares as the known rates."""
    trial = simulate(design, seed=DEMO_SEED)
    data_path = folder / f"{design}.csv"
    write_simulation(trial, data_path, truth=folder / f"{design}-truth.csv")
    roles = trial.design.roles
    spec = StudySpec(
        data=data_path, outcome=roles.outcome, treatment=roles.treatment, site=roles.site, id=roles.id,
        cost=roles.cost, rates=dict(trial.rates), seed=DEMO_SEED, name=design,
    )
    atomic_write_text(folder / f"{design}-study.toml", study_toml(spec))
    return spec


def study_toml(spec: StudySpec) -> str:
    """A study file (docs/file-formats.md) describing ``spec``, so the demo can be rerun with ``--study``."""
    lines = [f'name = "{spec.name}"', f'data = "{Path(spec.data).name}"', f'outcome = "{spec.outcome}"',
             f'treatment = "{spec.treatment}"', f'site = "{spec.site}"', f"seed = {spec.seed}"]
    lines += [f'{key} = "{getattr(spec, key)}"' for key in ("id", "cost") if getattr(spec, key)]
    if spec.rates:
        lines.append("")
        lines.append("[rates]")
        lines += [f'"{site}" = {rate}' for site, rate in spec.rates.items()]
    return "\n".join(lines) + "\n"


def demo_summary(results: list[PipelineResult]) -> list[str]:
    """One line per demo scenario: what it was built to show, the primary claims' adjusted verdicts and whether
    they show it (built to hold: none ``different``; built to break: ``different``, i.e. caught)."""
    from .core.interpret import DIFFERENT

    lines = []
    for result in results:
        name = result.study.spec.name
        purpose, why = DEMO_PURPOSE.get(name, ("hold", ""))
        rows = [r for r in result.scorecard.verdicts if r["primary"]]
        said = ", ".join(f"{r['claim']} {r['verdict_adjusted']}" for r in rows) or "no primary claim scored"
        caught = any(r["verdict_adjusted"] == DIFFERENT for r in rows)
        if purpose == "hold":
            lines.append(f"built to hold ({name}: {why}): {said} — "
                         + ("NOT as expected." if caught else "as expected."))
        else:
            lines.append(f"built to break ({name}: {why}): {said} — "
                         + ("caught as expected." if caught else "NOT caught."))
    return lines


def run_demo(
    out_dir: Path | str, config: BlindConfig | None = None, *, force: bool = False, progress: Tick | None = None,
) -> list[PipelineResult]:
    """The shipped demo: the library-branch coaching trial, then its hidden-branch-effect variant.

    The whole demo folder (data, claims, scorecards, reports of both designs) is staged and published at
    once; a folder that an earlier demo wrote (it holds the marker file) is replaced without ``force``.
    """
    out = Path(out_dir)
    force = force or (out / DEMO_MARKER).exists()
    results = []
    with StagedOutput(out, force) as staged:
        atomic_write_text(staged / DEMO_MARKER,
                          "written by `siteproof demo`; rerunning the demo replaces this folder\n")
        for design in DEMO_DESIGNS:
            folder = staged / design
            folder.mkdir()
            spec = write_demo_data(design, folder)
            result = run_pipeline(spec, None, config, progress=progress)
            write_claims(result.claims, folder)
            _write_scorecard(folder, result.claims, result.scorecard, True)
            results.append(result)
    for result, design in zip(results, DEMO_DESIGNS):
        result.study.spec.data = out / design / f"{design}.csv"
        result.out_dir = out / design
    return results


def _config_for(spec: StudySpec, config: BlindConfig | None, margin: float | None = None) -> BlindConfig:
    """The blind settings, seeded from the study's seed unless a config was given; a margin given here or in
    the study (and not in the config) becomes the plan's ATE-family margin."""
    config = config if config is not None else BlindConfig(seed=spec.seed)
    chosen = _margin(spec, margin)
    return replace(config, margin=chosen) if config.margin is None and chosen is not None else config


def _margin(spec: StudySpec, margin: float | None) -> float | None:
    return margin if margin is not None else spec.margin
