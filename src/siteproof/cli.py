"""The ``siteproof`` command line: a thin typer shell over the Python API.

Every verb parses flags, calls one API function and prints its result. User mistakes surface as a single
line ``error: <what> — <how to fix>`` on stderr with exit status 2 and no traceback; outputs are published
only when the whole command succeeded.
"""

from __future__ import annotations

import functools
import inspect
import sys
import typing
import warnings
from dataclasses import fields
from pathlib import Path
from typing import Annotated, Any, Callable, Optional

import typer

try:  # typer ≥ 0.20 carries its own copy of click
    from typer import _click as click
except ImportError:  # pragma: no cover - older typer uses the click package
    import click

from . import __version__
from .core.errors import SiteproofError, SiteproofWarning
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
# options shared by several verbs
# ---------------------------------------------------------------------------------------------------------
OutOpt = Annotated[Path, typer.Option("--out", help="Output folder.")]
ForceOpt = Annotated[bool, typer.Option("--force", help="Overwrite earlier results in the output folder.")]
FoldsOpt = Annotated[int, typer.Option("--folds", help="Cross-fitting folds K.")]
ModelsOpt = Annotated[str, typer.Option("--models", help="Effect models by key: constant,s,t,x,r,dr.")]
TransportOpt = Annotated[bool, typer.Option("--transport", help="Also run leave-one-site-out transport.")]
WorkersOpt = Annotated[int, typer.Option("--workers", help="Local processes for transport.")]
FailOnOpt = Annotated[Optional[str], typer.Option(
    "--fail-on", help="Exit 1 when a primary claim's adjusted verdict is this ('different'); failing ids on stderr.")]
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


def _print_scorecard(scorecard, out_dir: Path) -> None:
    from .core.console import console
    from .reporting.screens import scorecard_renderables

    for item in scorecard_renderables(scorecard):
        console.print(item)
    console.print(f"\nscorecard: {out_dir / 'scorecard.json'}")
    if (out_dir / "report.html").exists():
        console.print(f"report:    {out_dir / 'report.html'}")


def _exit_for(scorecard, fail_on: Optional[str]) -> None:
    from .unmask.verdicts import failing_claims

    if fail_on is None:
        return
    if fail_on != "different":
        raise SiteproofError(f"--fail-on {fail_on} is not supported", "use --fail-on different")
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
    out: Annotated[Path, typer.Option("--out", help="Output folder.")] = Path("siteproof-demo"),
    force: ForceOpt = False,
) -> None:
    """Run the whole job on the shipped library-coaching demo and on its hidden-branch-effect variant."""
    from .blind.analysis import BlindConfig
    from .core.console import console
    from .pipeline import DEMO_SEED, run_demo

    config = BlindConfig(seed=DEMO_SEED)
    with _fit_progress(config) as tick:
        results = run_demo(out, config, force=force, progress=tick)
    for result in results:
        console.rule(f"[bold]{result.study.spec.name}")
        _print_scorecard(result.scorecard, result.out_dir)


@app.command()
def simulate(
    design: Annotated[str, typer.Argument(help="A shipped design name or a design TOML file.")],
    out: Annotated[Path, typer.Option("--out", help="Data file to write (.csv or .parquet).")],
    n: Annotated[Optional[int], typer.Option("--n", help="Number of units (default: the design's).")] = None,
    seed: Annotated[int, typer.Option("--seed", help="Random seed.")] = 0,
    truth: Annotated[Optional[Path], typer.Option("--truth", help="Also write each unit's true effect here.")] = None,
) -> None:
    """Simulate a pooled multi-site trial with known truth from a synthetic_sites design."""
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
    out: Annotated[Path, typer.Option("--out", help="Benchmark folder (public/ and key/ are written inside).")],
    holdout_share: Annotated[float, typer.Option("--holdout-share", help="Share of units whose outcome and treatment are blanked and graded (0 = grade every unit).")] = 0.0,
    force: ForceOpt = False,
) -> None:
    """Seal a holdout benchmark: leak audit, then public data for students and a key for the teacher."""
    spec = spec_from_flags(flags, out)
    from .core.console import console
    from .benchmark.holdout import seal_benchmark

    result = seal_benchmark(spec, out, holdout_share=holdout_share, force=force)
    console.print(f"sealed {result.n:,} units ({result.n_graded:,} graded); "
                  f"design-based ATE {result.design_ate.estimate:.3f} (SE {result.design_ate.se:.3f}) kept in the key")
    console.print(f"hand out: {Path(out) / 'public'}   keep sealed: {Path(out) / 'key'}")


@app.command()
def grade(
    key: Annotated[Path, typer.Argument(help="The key/ folder written by `siteproof seal`.")],
    submissions: Annotated[list[Path], typer.Argument(help="Submission CSV files or folders of them.")],
    out: OutOpt,
    rank_by: Annotated[str, typer.Option("--rank-by", help="autoc, qini, blp_beta2, rule_gain or ate_error.")] = "autoc",
    reveal: Annotated[bool, typer.Option("--reveal", help="Also show per-site results (lets students rebuild the key).")] = False,
    force: ForceOpt = False,
) -> None:
    """Grade submissions against a sealed key into a leaderboard (CSV, JSON, HTML)."""
    from .core.console import console
    from .benchmark.holdout import grade_submissions, leaderboard_table, write_leaderboard

    board = grade_submissions(key, submissions, rank_by=rank_by, reveal=reveal)
    write_leaderboard(board, out, force=force)
    console.print(leaderboard_table(board))
    console.print(f"leaderboard: {Path(out) / 'leaderboard.html'}")


@app.command()
def study(
    design: Annotated[str, typer.Argument(help="A shipped design name or a design TOML file.")],
    replicates: Annotated[int, typer.Option("--replicates", help="Number of simulated trials.")],
    out: OutOpt,
    n: Annotated[Optional[int], typer.Option("--n", help="Units per replicate (default: the design's).")] = None,
    workers: Annotated[int, typer.Option("--workers", help="Local processes or LocalCluster workers.")] = 1,
    scheduler: Annotated[Optional[str], typer.Option("--scheduler", help="'local' (a dask.distributed LocalCluster) or a scheduler address tcp://HOST:PORT; default: local processes.")] = None,
    seed: Annotated[int, typer.Option("--seed", help="Study seed (same seed, same replicates.csv).")] = 0,
) -> None:
    """Monte Carlo design study: simulate, run blind + unmask, record bias, coverage and verdicts; resumable."""
    from .core.console import console, progress_bar
    from .simulation.montecarlo import run_study

    result = run_study(design, replicates, out, n=n, workers=workers, scheduler=scheduler, seed=seed,
                       progress=progress_bar)
    console.print(
        f"design '{result.design}', n = {result.n}, seed {result.seed}: {result.replicates} replicates "
        f"({result.ran} run now, {result.reused} kept from an earlier run) in {result.seconds:.0f} s; "
        f"population ATE {result.population_ate:.3f}"
    )
    console.print(f"replicates: {Path(out) / 'replicates.csv'}   summary: {Path(out) / 'summary.csv'}, "
                  f"{Path(out) / 'summary.html'}")


# ---------------------------------------------------------------------------------------------------------
# entry point: one-line errors, exit 2, no traceback
# ---------------------------------------------------------------------------------------------------------
def _usage_line(exc: click.exceptions.UsageError) -> str:
    command = exc.ctx.command_path if exc.ctx is not None else "siteproof"
    return f"error: {exc.format_message()} — see `{command} --help`"


def main(argv: Optional[list[str]] = None) -> int:
    """Console entry point; returns the exit status (0 ok, 1 `--fail-on` triggered, 2 user error)."""
    command = typer.main.get_command(app)
    with warnings.catch_warnings():
        warnings.simplefilter("always", SiteproofWarning)
        warnings.showwarning = _show_warning  # restored when the block ends
        return _invoke(command, argv)


def _invoke(command: click.Command, argv: Optional[list[str]]) -> int:
    """Run the click command, turning user mistakes into one line on stderr and an exit status."""
    try:
        result = command.main(args=argv, prog_name="siteproof", standalone_mode=False)
    except click.exceptions.NoArgsIsHelpError as exc:
        print(exc.ctx.get_help() if exc.ctx is not None else exc.format_message())
        return 2
    except SiteproofError as exc:
        print(exc.one_line(), file=sys.stderr)
        return 2
    except click.exceptions.UsageError as exc:
        print(" ".join(_usage_line(exc).split()), file=sys.stderr)
        return 2
    except typer.Exit as exc:
        return int(exc.exit_code)
    except typer.Abort:
        print("error: interrupted — rerun the command; no partial outputs were kept", file=sys.stderr)
        return 130
    return int(result or 0)


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:  # noqa: ANN001
    """Print siteproof warnings as one line each on stderr; other libraries' warnings stay quiet."""
    if issubclass(category, SiteproofWarning):
        print(f"warning: {message}", file=sys.stderr)


def entry() -> None:
    """``siteproof`` executable."""
    sys.exit(main())
