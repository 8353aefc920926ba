"""The ``siteproof`` command line: a thin typer shell over the Python API.

Every verb parses flags, calls one API function and prints its result. The exit status is a contract
(docs/cli.md): 0 success, 1 a ``--fail-on`` finding, 2 a user mistake (one line ``error: <what> — <how to
fix>``), 3 an internal error (one line naming the log file with the traceback), 130 Ctrl-C; never a traceback.
Flags, seeds and the output path are checked while the command line is parsed, before any work; outputs are
published only when the whole command succeeded.
"""

from __future__ import annotations

import contextlib
import functools
import inspect
import signal
import sys
import threading
import typing
from dataclasses import fields
from pathlib import Path
from typing import Annotated, Any, Callable, Iterator, Optional

import typer

try:  # typer ≥ 0.20 carries its own copy of click
    from typer import _click as click
except ImportError:  # pragma: no cover - older typer uses the click package
    import click

from . import __version__
from .benchmark.layout import DEFAULT_HOLDOUT_SHARE
from .core.console import quiet_stderr
from .core.errors import SiteproofError, internal_error_line
from .intake.flags import DataFlags, spec_from_flags, split_list

app = typer.Typer(
    name="siteproof",
    help="Blind observational analysis of pooled multi-site trials, scored against each site's randomization.",
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)


def _print_version(value: bool) -> None:
    """``--version``: print ``siteproof <version>`` and stop."""
    if value:
        print(f"siteproof {__version__}")
        raise typer.Exit(0)


@app.callback()
def _root(
    version: Annotated[
        bool, typer.Option("--version", help="Print the version and exit.", is_eager=True, callback=_print_version)
    ] = False,
    verbose: Annotated[
        bool, typer.Option("--verbose", help="Also show other libraries' warnings and logs (allowed after any command).")
    ] = False,
) -> None:
    """Blind observational analysis of pooled multi-site trials, scored against each site's randomization."""


# ---------------------------------------------------------------------------------------------------------
# data flags shared by run, blind, unmask and seal
# ---------------------------------------------------------------------------------------------------------
_DATA_HELP = {
    "study": "Study file (TOML) naming the data and column roles; flags override its keys.",
    "outcome": "Outcome column (numeric; 0/1 allowed).",
    "treatment": "Treatment column (exactly two values).",
    "site": "Site column (hidden from the blind analysis).",
    "treated_value": "Which treatment value means treated (0/1 and true/false are inferred).",
    "covariates": "Comma-separated covariate columns (default: every other column).",
    "id": "Unit id column.",
    "cost": "Per-unit cost of treating.",
    "stratum": "Randomization stratum within site.",
    "cluster": "Unit of assignment or of repeated measurement (classroom, household, person); clusters must be nested in sites.",
    "rates": "Known assignment probabilities, e.g. A=0.5,B=0.8 (or SITE:STRATUM=P).",
    "margin": "Equivalence margin δ of the ATE family, locked in the blind plan (default 0.1 × pooled within-arm "
              "residual SD of the outcome).",
    "seed": "Seed for every random step (same seed, same output).",
    "encoding": "Text encoding of a CSV that is not UTF-8, e.g. latin-1.",
    "keep_column": "Keep a covariate that resembles the site (repeatable).",
    "drop_column": "Drop a column before analysis (repeatable).",
    "site_derived": "Mark a column as derived from the site: never seen blind (repeatable).",
}


def _data_parameters() -> list[inspect.Parameter]:
    hints = typing.get_type_hints(DataFlags)
    params = [
        inspect.Parameter(
            "data", inspect.Parameter.POSITIONAL_OR_KEYWORD, default=None,
            annotation=Annotated[Optional[Path], typer.Argument(help="Pooled data, CSV or Parquet.", show_default=False)],
        )
    ]
    for f in fields(DataFlags):
        if f.name == "data":
            continue
        flag = "--" + f.name.replace("_", "-")
        params.append(
            inspect.Parameter(
                f.name, inspect.Parameter.KEYWORD_ONLY, default=None,
                annotation=Annotated[hints[f.name], typer.Option(flag, help=_DATA_HELP[f.name], show_default=False)],
            )
        )
    return params


def with_data_flags(func: Callable[..., Any]) -> Callable[..., Any]:
    """Give a command the shared data flags; the command receives them packed as ``flags: DataFlags``."""
    hints = typing.get_type_hints(func, include_extras=True)
    own = [p.replace(annotation=hints[p.name]) for p in inspect.signature(func).parameters.values() if p.name != "flags"]
    data_params = _data_parameters()
    names = {p.name for p in data_params}

    @functools.wraps(func)
    def wrapper(**kwargs: Any) -> Any:
        flags = DataFlags(**{name: kwargs.pop(name) for name in names})
        return func(flags=flags, **kwargs)

    keyword = [p.replace(kind=inspect.Parameter.KEYWORD_ONLY) for p in own]
    wrapper.__signature__ = inspect.Signature(data_params[:1] + keyword + data_params[1:])  # type: ignore[attr-defined]
    wrapper.__annotations__ = {p.name: p.annotation for p in wrapper.__signature__.parameters.values()}  # type: ignore[attr-defined]
    return wrapper


# ---------------------------------------------------------------------------------------------------------
# early checks: run while the command line is parsed, before any data is read or any model is fitted
# ---------------------------------------------------------------------------------------------------------
FAIL_ON_VALUES = ("different",)


def _out_folder(value: Optional[Path]) -> Optional[Path]:
    """``--out`` of a results folder: not a file, not under a file, writable."""
    from .core.outputs import check_out_path

    return value if value is None else check_out_path(value, "folder")


def _out_file(value: Optional[Path]) -> Optional[Path]:
    """``--out``/``--truth`` of a single file: not a folder, its folder writable."""
    from .core.outputs import check_out_path

    return value if value is None else check_out_path(value, "file")


def _fail_on(value: Optional[str]) -> Optional[str]:
    """``--fail-on`` names a verdict it can act on."""
    if value is not None and value not in FAIL_ON_VALUES:
        raise SiteproofError(f"--fail-on {value} is not supported", "use --fail-on different")
    return value


def _seed(value: Optional[int]) -> Optional[int]:
    """``--seed`` in 0 ≤ seed < 2³² (what every random generator used accepts)."""
    from .intake.flags import check_seed

    return value if value is None else check_seed(value)


# ---------------------------------------------------------------------------------------------------------
# options shared by several verbs
# ---------------------------------------------------------------------------------------------------------
OutOpt = Annotated[Path, typer.Option("--out", help="Output folder.", callback=_out_folder)]
ForceOpt = Annotated[bool, typer.Option("--force", help="Replace the earlier results in the output folder (the whole folder).")]
FoldsOpt = Annotated[int, typer.Option("--folds", help="Cross-fitting folds K.")]
ModelsOpt = Annotated[str, typer.Option("--models", help="Effect models by key: constant,s,t,x,r,dr.")]
TransportOpt = Annotated[bool, typer.Option("--transport", help="Also run leave-one-site-out transport.")]
WorkersOpt = Annotated[int, typer.Option("--workers", help="Local processes for transport.")]
FailOnOpt = Annotated[Optional[str], typer.Option(
    "--fail-on", help="Exit 1 when a primary claim's adjusted verdict is this ('different'); failing ids on stderr.",
    callback=_fail_on)]
SeedOpt = Annotated[int, typer.Option("--seed", help="Random seed, 0 ≤ seed < 2³² (same seed, same output).", callback=_seed)]
AlphaOpt = Annotated[Optional[float], typer.Option("--alpha", help="Test level α of the plan (default 0.05).")]
MultiplicityOpt = Annotated[Optional[str], typer.Option(
    "--multiplicity", help="Adjustment within each claim family: holm (default) or bh.")]
DeviateOpt = Annotated[bool, typer.Option(
    "--deviate-from-plan", help="Allow --margin/--alpha/--multiplicity to differ from the locked plan (recorded).")]


def _blind_config(seed: int, folds: int, models: str, alpha: Optional[float] = None,
                  multiplicity: Optional[str] = None):
    from .blind.analysis import BlindConfig

    plan = {k: v for k, v in (("alpha", alpha), ("multiplicity", multiplicity)) if v is not None}
    return BlindConfig(seed=seed, folds=folds, models=tuple(split_list(models) or ()), **plan)


def _fit_progress(config):
    from .blind.analysis import count_fits
    from .core.console import progress_bar

    return progress_bar("fitting models", count_fits(config))


def _print_scorecard(scorecard, out_dir: Path, legend: bool = True) -> None:
    from .core.console import console
    from .reporting.screens import scorecard_renderables

    for item in scorecard_renderables(scorecard, legend=legend):
        console.print(item)
    console.print(f"\nscorecard: {out_dir / 'scorecard.json'}")
    if (out_dir / "report.html").exists():
        console.print(f"report:    {out_dir / 'report.html'}")


def _refuse_existing_files(paths: list[Optional[Path]], force: bool) -> None:
    """Refuse to overwrite an existing file unless ``--force``; refuse writing two outputs to one path."""
    given = [Path(p) for p in paths if p is not None]
    if len({p.absolute() for p in given}) < len(given):
        raise SiteproofError("--out and --truth name the same file", "give them different paths")
    for path in given:
        if path.exists() and not force:
            raise SiteproofError(f"{path} already exists", "choose another path or add --force to overwrite it")


def _exit_for(scorecard, fail_on: Optional[str]) -> None:
    from .unmask.verdicts import failing_claims

    if fail_on is None:
        return
    failing = failing_claims(scorecard)
    for claim in failing:
        typer.echo(f"different: {claim}", err=True)
    if failing:
        raise typer.Exit(1)


# ---------------------------------------------------------------------------------------------------------
# verbs
# ---------------------------------------------------------------------------------------------------------
@app.command()
def demo(
    out: Annotated[Path, typer.Option("--out", help="Output folder.", callback=_out_folder)] = Path("siteproof-demo"),
    force: ForceOpt = False,
) -> None:
    """Run the whole job on the shipped library-coaching demo and on its hidden-branch-effect variant."""
    from .blind.analysis import BlindConfig
    from .core.console import console
    from .pipeline import DEMO_SEED, demo_summary, run_demo
    from .reporting.screens import scorecard_legend

    config = BlindConfig(seed=DEMO_SEED)
    with _fit_progress(config) as tick:
        results = run_demo(out, config, force=force, progress=tick)
    for result in results:
        console.rule(f"[bold]{result.study.spec.name}")
        _print_scorecard(result.scorecard, result.out_dir, legend=False)
    console.rule("[bold]legend")
    console.print(scorecard_legend(results[-1].scorecard))
    console.rule("[bold]summary")
    for line in demo_summary(results):
        console.print(line, style="bold")


@app.command()
def simulate(
    design: Annotated[str, typer.Argument(help="A shipped design name or a design TOML file.")],
    out: Annotated[Path, typer.Option("--out", help="Data file to write (.csv or .parquet).", callback=_out_file)],
    n: Annotated[Optional[int], typer.Option("--n", help="Number of units (default: the design's).")] = None,
    seed: SeedOpt = 0,
    truth: Annotated[Optional[Path], typer.Option("--truth", help="Also write each unit's true effect here.", callback=_out_file)] = None,
    force: Annotated[bool, typer.Option("--force", help="Overwrite existing files.")] = False,
) -> None:
    """Simulate a pooled multi-site trial with known truth from a synthetic_sites design."""
    _refuse_existing_files([out, truth], force)
    from .core.console import console
    from .simulation.simulate import simulate as simulate_trial
    from .simulation.simulate import write_simulation

    trial = simulate_trial(design, n=n, seed=seed)
    write_simulation(trial, out, truth=truth)
    console.print(f"wrote {len(trial.data)} units from design '{trial.design.name}' to {out}"
                  + (f" (truth: {truth})" if truth else ""))


@app.command()
@with_data_flags
def blind(
    flags: DataFlags,
    out: OutOpt,
    folds: FoldsOpt = 5,
    models: ModelsOpt = "constant,s,t,x,r,dr",
    alpha: AlphaOpt = None,
    multiplicity: MultiplicityOpt = None,
    force: ForceOpt = False,
) -> None:
    """Blind analysis (site hidden): propensities, average and heterogeneous effects, rules, locked plan → claims.json."""
    spec = spec_from_flags(flags, out)
    from .core.console import console
    from .pipeline import blind_stage
    from .reporting.screens import claims_renderables

    config = _blind_config(spec.seed, folds, models, alpha, multiplicity)
    with _fit_progress(config) as tick:
        _, claims = blind_stage(spec, out, config, force=force, progress=tick)
    for item in claims_renderables(claims):
        console.print(item)
    console.print(f"\nclaims: {out / 'claims.json'}")


@app.command()
@with_data_flags
def unmask(
    flags: DataFlags,
    claims: Annotated[Path, typer.Option("--claims", help="Folder written by `siteproof blind`.")],
    out: OutOpt,
    transport: TransportOpt = False,
    workers: WorkersOpt = 1,
    fail_on: FailOnOpt = None,
    alpha: AlphaOpt = None,
    multiplicity: MultiplicityOpt = None,
    deviate_from_plan: DeviateOpt = False,
    force: ForceOpt = False,
) -> None:
    """Reveal sites and known rates; score every blind claim by the locked plan → scorecard.json with verdicts."""
    spec = spec_from_flags(flags, out)
    from .pipeline import unmask_stage

    result = unmask_stage(
        spec, claims, out, margin=flags.margin, alpha=alpha, multiplicity=multiplicity,
        deviate_from_plan=deviate_from_plan, transport=transport, workers=workers, force=force,
    )
    _print_scorecard(result.scorecard, out)
    _exit_for(result.scorecard, fail_on)


@app.command()
@with_data_flags
def run(
    flags: DataFlags,
    out: OutOpt,
    folds: FoldsOpt = 5,
    models: ModelsOpt = "constant,s,t,x,r,dr",
    transport: TransportOpt = False,
    workers: WorkersOpt = 1,
    fail_on: FailOnOpt = None,
    alpha: AlphaOpt = None,
    multiplicity: MultiplicityOpt = None,
    force: ForceOpt = False,
) -> None:
    """Blind analysis (with its locked plan), unmasking and report in one go."""
    spec = spec_from_flags(flags, out)
    from .pipeline import run_pipeline

    config = _blind_config(spec.seed, folds, models, alpha, multiplicity)
    with _fit_progress(config) as tick:
        result = run_pipeline(
            spec, out, config, margin=flags.margin, transport=transport, workers=workers, force=force, progress=tick
        )
    _print_scorecard(result.scorecard, out)
    _exit_for(result.scorecard, fail_on)


@app.command()
def report(
    run_dir: Annotated[Path, typer.Argument(help="A folder written by `siteproof run` or `unmask`.")],
) -> None:
    """Rewrite report.html, report.md and figures/ from a run folder's claims.json and scorecard.json."""
    from .core.console import console
    from .reporting.report import report_from_folder

    paths = report_from_folder(run_dir)
    console.print(f"report: {paths['html']}")


@app.command()
@with_data_flags
def seal(
    flags: DataFlags,
    out: Annotated[Path, typer.Option("--out", help="Benchmark folder (public/ and key/ are written inside).", callback=_out_folder)],
    holdout_share: Annotated[float, typer.Option("--holdout-share", help="Share of units whose outcome and treatment are blanked; only they are graded (0 = grade every published unit, in-sample).")] = DEFAULT_HOLDOUT_SHARE,
    secret_file: Annotated[Optional[Path], typer.Option("--secret-file", help="Reuse the sealing secret of an earlier seal (its key/secret.txt) to reproduce it byte for byte.", show_default=False)] = None,
    accept_row_order: Annotated[bool, typer.Option("--accept-row-order", help="Seal although the source file's row order predicts the site (the public rows are shuffled with a secret).")] = False,
    force: ForceOpt = False,
) -> None:
    """Seal a holdout benchmark: leak audit, then public data for students and a key for the teacher."""
    spec = spec_from_flags(flags, out)
    from .core.console import console
    from .benchmark.holdout import seal_benchmark

    result = seal_benchmark(spec, out, holdout_share=holdout_share, secret_file=secret_file,
                            accept_row_order=accept_row_order, force=force)
    graded = "held out and graded" if result.holdout_share > 0 else "graded in-sample (outcomes published)"
    console.print(f"sealed {result.n:,} units ({result.n_graded:,} {graded}); "
                  f"design-based ATE {result.design_ate.estimate:.3f} (SE {result.design_ate.se:.3f}) kept in the key")
    console.print(f"hand out: {Path(out) / 'public'}   keep sealed: {Path(out) / 'key'} "
                  f"(its secret.txt reproduces this seal)")


@app.command()
def grade(
    key: Annotated[Path, typer.Argument(help="The key/ folder written by `siteproof seal`.")],
    submissions: Annotated[list[Path], typer.Argument(help="Submission CSV files or folders of them.")],
    out: OutOpt,
    rank_by: Annotated[str, typer.Option("--rank-by", help="autoc, qini, blp_beta2, rule_gain or ate_error.")] = "autoc",
    reveal: Annotated[bool, typer.Option("--reveal", help="Also show per-site results (lets students rebuild the key).")] = False,
    withhold_answers: Annotated[bool, typer.Option("--withhold-answers/--show-answers", help="Keep the design-based answers (design ATE, ATE errors, CI coverage, per-site estimates) out of the leaderboard.")] = True,
    force: ForceOpt = False,
) -> None:
    """Grade submissions against a sealed key into a leaderboard (CSV, JSON, HTML)."""
    from .core.console import console
    from .benchmark.holdout import grade_submissions, leaderboard_table, write_leaderboard

    board = grade_submissions(key, submissions, rank_by=rank_by, reveal=reveal, withhold_answers=withhold_answers)
    write_leaderboard(board, out, force=force)
    console.print(leaderboard_table(board, width=min(console.width, 80)))
    console.print(f"leaderboard: {Path(out) / 'leaderboard.html'}")


@app.command()
def study(
    design: Annotated[str, typer.Argument(help="A shipped design name or a design TOML file.")],
    replicates: Annotated[int, typer.Option("--replicates", help="Number of simulated trials.")],
    out: OutOpt,
    n: Annotated[Optional[int], typer.Option("--n", help="Units per replicate (default: the design's).")] = None,
    workers: Annotated[int, typer.Option("--workers", help="Local processes or LocalCluster workers.")] = 1,
    scheduler: Annotated[Optional[str], typer.Option("--scheduler", help="'local' (a dask.distributed LocalCluster) or a scheduler address tcp://HOST:PORT; default: local processes.")] = None,
    seed: Annotated[int, typer.Option("--seed", help="Study seed, 0 ≤ seed < 2³² (same seed, same replicates.csv).", callback=_seed)] = 0,
    ignore_clusters: Annotated[bool, typer.Option("--ignore-clusters", help="Analyse a clustered design as if its clusters were unknown (to measure what declaring them prevents).")] = False,
) -> None:
    """Monte Carlo design study: simulate, run blind + unmask, record bias, coverage and verdicts; resumable."""
    from .core.console import console, progress_bar
    from .simulation.montecarlo import run_study

    result = run_study(design, replicates, out, n=n, workers=workers, scheduler=scheduler, seed=seed,
                       progress=progress_bar, clusters=not ignore_clusters)
    console.print(
        f"design '{result.design}', n = {result.n}, seed {result.seed}: {result.replicates} replicates "
        f"({result.ran} run now, {result.reused} kept from an earlier run"
        + (f", {len(result.recomputed)} damaged or foreign parts recomputed" if result.recomputed else "")
        + f") in {result.seconds:.0f} s; "
        f"population ATE {result.population_ate:.3f}"
    )
    console.print(f"replicates: {Path(out) / 'replicates.csv'}   summary: {Path(out) / 'summary.csv'}, "
                  f"{Path(out) / 'summary.html'}")


@app.command()
def confound(
    data: Annotated[Path, typer.Argument(help="A randomized trial (any table format siteproof reads).")],
    outcome: Annotated[str, typer.Option("--outcome", help="Outcome column.")],
    treatment: Annotated[str, typer.Option("--treatment", help="Treatment column (exactly two values).")],
    out: OutOpt,
    covariates: Annotated[Optional[str], typer.Option("--covariates", help="Comma-separated covariates (default: every other column).")] = None,
    strength: Annotated[Optional[float], typer.Option("--strength", help="Log-odds shift of the rate across cells (default 1; 0: no confounding).")] = None,
    cells: Annotated[Optional[int], typer.Option("--cells", help="Number of cells K (default 4).")] = None,
    by: Annotated[Optional[str], typer.Option("--by", help="Form cells from one or two covariates, e.g. age,educ (default: a prognostic score).")] = None,
    rule: Annotated[Optional[Path], typer.Option("--rule", help="TOML rule file with the cells and their keep probabilities per arm.")] = None,
    trial_rate: Annotated[Optional[float], typer.Option("--trial-rate", help="The trial's assignment probability (default: the realized treated share).")] = None,
    treated_value: Annotated[Optional[str], typer.Option("--treated-value", help=_DATA_HELP["treated_value"])] = None,
    encoding: Annotated[Optional[str], typer.Option("--encoding", help=_DATA_HELP["encoding"])] = None,
    seed: Annotated[int, typer.Option("--seed", help="Seed of the cells' score folds and of the draw, 0 ≤ seed < 2³².", callback=_seed)] = 0,
    force: ForceOpt = False,
) -> None:
    """Draw a confounded subsample of a randomized trial with known per-cell rates → data.csv, study.toml, truth.json."""
    from rich import box
    from rich.table import Table

    from .core.console import console
    from .simulation.confound import confound_trial
    from .simulation.confoundfiles import write_confounded

    sample = confound_trial(
        data, outcome, treatment, split_list(covariates), strength=strength, cells=cells, seed=seed, rule=rule,
        treated_value=treated_value, by=split_list(by), trial_rate=trial_rate, encoding=encoding,
    )
    paths = write_confounded(sample, out, force=force)
    truth, bias = sample.truth, sample.induced_bias()
    table = Table("cell", "definition", "keep treated", "keep control", "rate", "trial", "kept", box=box.SIMPLE)
    for row in sample.to_frame().itertuples():
        table.add_row(row.cell, row.definition, f"{row.keep_treated:.3f}", f"{row.keep_control:.3f}",
                      f"{row.rate:.3f}", f"{row.n_trial:,}", f"{row.n_kept:,}")
    console.print(table)
    console.print(f"kept {int(sample.kept.sum()):,} of {sample.kept.size:,} units in {len(sample.cells)} cells; "
                  f"truth {truth.estimate:.4g} (SE {truth.se:.3g}); naive {sample.naive.estimate:.4g}, "
                  f"design-based {sample.design.estimate.estimate:.4g} (SE {sample.design.estimate.se:.3g}); "
                  f"induced bias {bias['realized']:.3g} (SE {bias['realized_se']:.3g})")
    console.print(f"study: {paths['study']}   truth: {paths['truth']}")


@app.command()
@with_data_flags
def sets(
    flags: DataFlags,
    out: OutOpt,
    set_: Annotated[Optional[list[str]], typer.Option("--set", help="A covariate set NAME=col1,col2 (repeatable; default: [covariate_sets] of the study file).")] = None,
    drop_each: Annotated[bool, typer.Option("--drop-each", help="Also run the full set and every leave-one-covariate-out set.")] = False,
    sensitivity: Annotated[bool, typer.Option("--sensitivity", help="Add the omitted-variable-bias analysis of each set.")] = False,
    folds: FoldsOpt = 5,
    force: ForceOpt = False,
) -> None:
    """Blind AIPW under several covariate sets (same folds and seed), each scored against the design → sets.json."""
    spec = spec_from_flags(flags, out)
    from .blind.analysis import BlindConfig
    from .core.console import console
    from .covsets import SETS_FILE, SETS_PAGE, parse_set_flags, run_sets
    from .reporting.sets_page import sets_table

    result = run_sets(spec, parse_set_flags(set_) if set_ else None, out, BlindConfig(seed=spec.seed, folds=folds), drop_each=drop_each,
                      margin=flags.margin, sensitivity=sensitivity, force=force)
    console.print(sets_table(result.to_dict()))
    console.print(f"\nsets: {out / SETS_FILE}   page: {out / SETS_PAGE}")


# ---------------------------------------------------------------------------------------------------------
# entry point: the exit-status contract (docs/cli.md)
# ---------------------------------------------------------------------------------------------------------
EXIT_OK, EXIT_FINDING, EXIT_USER, EXIT_INTERNAL, EXIT_INTERRUPTED = 0, 1, 2, 3, 130
VERBOSE_FLAG = "--verbose"


def _usage_line(exc: click.exceptions.UsageError) -> str:
    command = exc.ctx.command_path if exc.ctx is not None else "siteproof"
    return " ".join(f"error: {exc.format_message()} — see `{command} --help`".split())


def main(argv: Optional[list[str]] = None) -> int:
    """Console entry point; returns the exit status (docs/cli.md).

    0 success; 1 ``--fail-on`` found a claim with that verdict; 2 a user mistake (one line ``error: <what> —
    <how to fix>``); 3 an internal error (one line naming the log file that holds the traceback); 130
    interrupted (Ctrl-C).  Warnings are collected and printed once at the end, after the error line;
    other libraries' warnings and log messages appear only with ``--verbose``.
    """
    args = list(sys.argv[1:] if argv is None else argv)
    verbose = VERBOSE_FLAG in args
    args = [arg for arg in args if arg != VERBOSE_FLAG]
    with quiet_stderr(verbose) as collected, _watch_interrupts():
        code, line = _invoke(typer.main.get_command(app), args)
    if line:
        print(line, file=sys.stderr)
    if code != EXIT_INTERRUPTED:  # Ctrl-C: the one line only
        for message in collected.lines():
            print(message, file=sys.stderr)
    return code


def _invoke(command: click.Command, args: list[str]) -> tuple[int, str]:
    """Run the click command; map every outcome to (exit status, the one line to print on stderr or "")."""
    try:
        with command.make_context("siteproof", args) as ctx:
            result = command.invoke(ctx)
    except click.exceptions.NoArgsIsHelpError as exc:
        print(exc.ctx.get_help() if exc.ctx is not None else exc.format_message())
        return EXIT_USER, ""
    except SiteproofError as exc:
        return EXIT_USER, exc.one_line()
    except click.exceptions.UsageError as exc:
        return EXIT_USER, _usage_line(exc)
    except click.ClickException as exc:
        return EXIT_USER, " ".join(f"error: {exc.format_message()} — see `siteproof --help`".split())
    except typer.Exit as exc:
        return int(exc.exit_code), ""
    except (KeyboardInterrupt, typer.Abort):
        return EXIT_INTERRUPTED, _interrupted_line(args)
    except BrokenPipeError:
        return EXIT_OK, ""
    except Exception as exc:  # anything else is a bug in siteproof: one line, traceback in a log file
        if _INTERRUPTED.is_set():  # Ctrl-C inside a C extension surfaces as another error (e.g. ImportError)
            return EXIT_INTERRUPTED, _interrupted_line(args)
        return EXIT_INTERNAL, internal_error_line(exc, args)
    return int(result or EXIT_OK), ""


_INTERRUPTED = threading.Event()


@contextlib.contextmanager
def _watch_interrupts() -> Iterator[None]:
    """Remember that SIGINT arrived (then raise KeyboardInterrupt as usual), so an interrupt that a C extension
    turns into another exception is still reported as an interrupt; a no-op outside the main thread."""
    _INTERRUPTED.clear()
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum: int, frame: Any) -> None:  # noqa: ARG001
        _INTERRUPTED.set()
        raise KeyboardInterrupt

    previous = signal.signal(signal.SIGINT, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)


def _interrupted_line(args: list[str]) -> str:
    """What Ctrl-C left: nothing, or (for ``study``) the replicates that had finished."""
    if args and args[0] == "study":
        return "interrupted — finished replicates are kept; rerun the same command to resume"
    return "interrupted — nothing was written"


def entry() -> None:
    """``siteproof`` executable."""
    sys.exit(main())
