"""The main job end to end: intake → blind claims → scorecard → report, and the shipped demo.

Each stage is a function of the Python API; the CLI verbs ``blind``, ``unmask``, ``run`` and ``demo`` are thin
shells over the functions here. Outputs are staged in a scratch folder and published only when the whole
stage succeeded (:class:`~siteproof.core.outputs.StagedOutput`), so an error never leaves partial results.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Callable

from .blind.analysis import BlindConfig, Claims, run_blind
from .blind.claims import read_claims, write_claims
from .core.outputs import StagedOutput, atomic_write_json, atomic_write_text, check_out_dir
from .reporting.report import write_report
from .simulation.simulate import simulate, write_simulation
from .intake.study import Study, StudySpec, load_study
from .unmask.scoring import Scorecard, run_unmask

Tick = Callable[[str], None]
DEMO_SEED = 20261202
DEMO_DESIGNS = ("demo", "hidden_branch")
DEMO_MARKER = ".siteproof-demo"


@dataclass
class PipelineResult:
    """What one run produced: the study, the claims (None when unmasking earlier claims), the scorecard."""

    study: Study
    claims: dict
    scorecard: Scorecard | None
    out_dir: Path


def blind_stage(
    spec: StudySpec, out_dir: Path | str, config: BlindConfig | None = None, *, force: bool = False,
    progress: Tick | None = None,
) -> tuple[Study, Claims]:
    """Intake and blind analysis; writes ``claims.json`` and ``units.parquet`` into ``out_dir``."""
    check_out_dir(out_dir, force)  # refuse before any work, not after it
    study = load_study(spec)
    with StagedOutput(out_dir, force) as staged:
        claims = run_blind(study.blind, _config_for(spec, config), progress=progress)
        write_claims(claims.to_dict(), claims.units, staged)
    return study, claims


def unmask_stage(
    spec: StudySpec, claims_dir: Path | str, out_dir: Path | str, *, margin: float | None = None,
    transport: bool = False, workers: int = 1, force: bool = False, report: bool = True,
) -> PipelineResult:
    """Unmask earlier claims against the sites' randomization; writes ``scorecard.json`` (and the report)."""
    check_out_dir(out_dir, force)
    study = load_study(spec)
    record, units = read_claims(claims_dir)
    scorecard = run_unmask(
        study, record, units, margin=_margin(spec, margin), seed=spec.seed, transport=transport, workers=workers
    )
    with StagedOutput(out_dir, force) as staged:
        atomic_write_json(staged / "scorecard.json", scorecard.to_dict())
        if report:
            write_report(staged, record, scorecard.to_dict())
    return PipelineResult(study, record, scorecard, Path(out_dir))


def run_pipeline(
    spec: StudySpec, out_dir: Path | str, config: BlindConfig | None = None, *, margin: float | None = None,
    transport: bool = False, workers: int = 1, force: bool = False, report: bool = True,
    progress: Tick | None = None,
) -> PipelineResult:
    """Blind + unmask (+ report) in one go, all outputs published together at the end."""
    check_out_dir(out_dir, force)
    study = load_study(spec)
    claims = run_blind(study.blind, _config_for(spec, config), progress=progress)
    record = claims.to_dict()
    scorecard = run_unmask(
        study, record, claims.units, margin=_margin(spec, margin), seed=spec.seed,
        transport=transport, workers=workers,
    )
    with StagedOutput(out_dir, force) as staged:
        write_claims(record, claims.units, staged)
        atomic_write_json(staged / "scorecard.json", scorecard.to_dict())
        if report:
            write_report(staged, record, scorecard.to_dict())
    return PipelineResult(study, record, scorecard, Path(out_dir))


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


def run_demo(
    out_dir: Path | str, config: BlindConfig | None = None, *, force: bool = False, progress: Tick | None = None,
) -> list[PipelineResult]:
    """The shipped demo: the library-branch coaching trial, then its hidden-branch-effect variant.

    A folder that an earlier demo wrote (it holds the marker file) is overwritten without ``force``.
    """
    out = Path(out_dir)
    force = force or (out / DEMO_MARKER).exists()
    for design in DEMO_DESIGNS:
        check_out_dir(out / design, force)
    out.mkdir(parents=True, exist_ok=True)
    atomic_write_text(out / DEMO_MARKER, "written by `siteproof demo`; rerunning the demo overwrites this folder\n")
    results = []
    for design in DEMO_DESIGNS:
        folder = out / design
        folder.mkdir(parents=True, exist_ok=True)
        spec = write_demo_data(design, folder)
        results.append(run_pipeline(spec, folder, config, force=True, progress=progress))
    return results


def _config_for(spec: StudySpec, config: BlindConfig | None) -> BlindConfig:
    """The blind settings, seeded from the study's seed unless a config was given."""
    return config if config is not None else BlindConfig(seed=spec.seed)


def _margin(spec: StudySpec, margin: float | None) -> float | None:
    return margin if margin is not None else spec.margin
