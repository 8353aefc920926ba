"""Monte Carlo design studies: many simulated multi-site trials with a known truth, each run blind + unmask.

A *study* draws R independent replicates from a synthetic_sites design (``simulate``).  Replicate r:

1. its seeds come from ``numpy.random.SeedSequence(seed).spawn(R)[r]`` (child r is the same whatever R is,
   so a study can be extended); three integers are drawn from the child with ``generate_state`` — one each
   for the simulation, the blind analysis and the unmask step;
2. it simulates n units, loads them as a study with the design's declared rates (the cost column is left
   out, so rules rank by effect alone and their gains are in outcome units), runs the blind analysis with
   the given :class:`~siteproof.blind.analysis.BlindConfig` (learners included) and unmasks the claims;
3. it records one row per ATE estimator, per CATE model and per learned rule (:data:`COLUMNS`; the replicate
   itself is :mod:`~siteproof.simulation.replicate`):

   * **ATE estimators** (``kind = "ate"``; plus the design-based estimator of unmask as ``name = "design"``):
     estimate, SE, 95 % CI, ``truth`` = the *population* ATE E[τ] of the design (``population_ate``, computed
     once per study and stored in study.json), ``truth_sample`` = mean of the simulated units' τ_i,
     ``error`` = estimate − truth, ``covered`` = [ci_low ≤ truth ≤ ci_high] (population truth) and
     ``covered_sample`` (sample truth), and the unmask verdict.  The overlap-weighted estimator's verdict is
     its same-estimand comparison (as in ``unmask.claim_verdicts``); its coverage is still measured against the
     population ATE, a different estimand unless τ is constant.
   * **CATE models** (``kind = "cate"``): PEHE = √(mean_i (τ̂_i − τ_i)²) of the out-of-fold τ̂ against the
     true unit effects (Hill 2011), and the model's blind AUTOC claim with its CI against the *true AUTOC of the
     same ranking*: the AUTOC statistic of ``evaluation.rank_metric`` computed with the true τ_i in place of
     the doubly robust scores Γ_i (Yadlowsky et al., rank-weighted average treatment effects).  The true AUTOC is
     an in-sample quantity (it depends on the fitted ranking), so ``truth_sample`` equals ``truth``.
     The constant-effect model has no AUTOC; its row carries the PEHE only (the benchmark a model must beat).
   * **Rules** (``kind = "rule"``): the blind gain over random allocation with the same treated share q̂ and
     its CI against the true gain G = mean_i (π_i − q̂)·τ_i (Imai & Li 2023), with the unmask verdict.

The ``design_based`` column holds the design-based counterpart the verdict compares with (unmask).

Outputs in the study folder: ``study.json`` (the settings; a rerun with other settings is refused, a damaged
one is a clear error), ``parts/rep-00042.csv`` + ``parts/rep-00042.json`` (one pair per finished replicate,
written atomically as soon as it lands; the record carries the replicate's seeds and the SHA-256 of the rows,
see :mod:`~siteproof.simulation.parts`), ``replicates.csv`` (the verified parts of replicates 0..R−1 in
replicate order, rebuilt at the end of every run), ``summary.csv`` (:func:`summarize`), ``timings.csv``
(seconds per replicate; kept apart so that replicates.csv depends on the seed only) and ``summary.html``
(``studyreport``).  Rerunning with the same folder resumes: intact replicates are not redone; damaged or
foreign parts are reported and recomputed.

Execution: replicates are independent tasks.  ``workers = 1`` runs them in this process; ``workers > 1`` in
local processes (``concurrent.futures.ProcessPoolExecutor``, spawn start method, one thread each);
``scheduler = "local"`` starts a ``dask.distributed.LocalCluster`` with ``workers`` single-threaded worker
processes; any other ``scheduler`` is the address of a running Dask scheduler (``tcp://HOST:PORT``), reached
before anything is written.
Results are collected as they complete (``as_completed``).  See docs/montecarlo.md.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import logging
import math
import multiprocessing
import os
import signal
import time
import warnings
from collections.abc import Callable, Iterator
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures import as_completed as futures_completed
from concurrent.futures.process import BrokenProcessPool
from contextlib import AbstractContextManager, closing, contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .. import __version__
from ..blind.analysis import BlindConfig
from ..core.console import library_noise_shown
from ..core.errors import SiteproofError
from ..core.outputs import atomic_write_json, atomic_write_text, check_out_dir
from ..intake.flags import check_seed
from .parts import COLUMNS, collect, discard_parts, part_numbers, read_replicates, save_part, verify_parts
from .scenario import MIN_N, Scenario
from .simulate import load_design, population_ate
from .replicate import (
    ReplicateResult, ReplicateTask, replicate_seeds, run_replicate, simulated_study, true_rank_metric,
)
from .studysummary import summarize

__all__ = ["COLUMNS", "ReplicateResult", "ReplicateTask", "StudyResult", "finished_replicates", "read_replicates",
           "replicate_seeds", "run_replicate", "run_study", "simulated_study", "true_rank_metric"]
SCHEMA = "siteproof/montecarlo-study"
VERSION = 1
Tick = Callable[[str], None]
ProgressFactory = Callable[[str, int], AbstractContextManager[Tick]]

SCHEDULER_TIMEOUT = "20s"
_THREAD_VARIABLES = ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS")


# ----------------------------------------------------------------------------------------------------------
# the study folder
# ----------------------------------------------------------------------------------------------------------
def design_fingerprint(design: Scenario) -> str:
    """sha256 of everything that defines the scenario's generative model (its file location excluded).

    The hashed text is the dataclass repr with the class's former name ``Design`` in front, so the study
    folders written before the class was named ``Scenario`` keep their fingerprint and still resume.
    """
    text = repr(dataclasses.replace(design, source=""))
    return hashlib.sha256(("Design" + text.removeprefix("Scenario")).encode("utf-8")).hexdigest()


def study_settings(design: Scenario, n: int, seed: int, config: BlindConfig, clusters: bool = True
                   ) -> dict[str, Any]:
    """The settings a study folder is bound to (study.json); a rerun must match them to resume.  Whether a
    clustered scenario is analysed with its clusters is recorded only for scenarios that have clusters."""
    blind = config.to_dict()
    blind.pop("seed")
    settings = {"design": design.name, "design_fingerprint": design_fingerprint(design), "n": int(n),
                "seed": int(seed), "blind": blind}
    if design.clusters is not None:
        settings["clusters"] = bool(clusters)
    return settings


def _open_folder(out: Path, settings: dict[str, Any]) -> dict[str, Any]:
    """Create the study folder, or check that an existing one holds a study with the same settings."""
    check_out_dir(out)
    path = out / "study.json"
    if path.exists():
        stored = read_study_file(path)
        differing = [key for key in settings if stored["settings"].get(key) != settings[key]]
        if differing:
            old = stored["settings"]
            text = ", ".join(f"{k} {_short(old.get(k))} → {_short(settings[k])}" for k in differing)
            raise SiteproofError(
                f"{out} holds a study with other settings ({text})",
                "rerun with the stored settings to resume it, or choose another --out folder",
            )
        return stored
    if out.is_dir() and any(out.iterdir()):
        raise SiteproofError(f"{out} is not empty and holds no study", "choose a new or empty --out folder")
    return {}


def read_study_file(path: Path) -> dict[str, Any]:
    """study.json of an existing study, checked: a JSON object with its settings, replicate count and
    population ATE; anything else is a damaged file (a clear error, never a traceback)."""
    def damaged(reason: str) -> SiteproofError:
        return SiteproofError(
            f"{path} is damaged ({reason}), so the study in {path.parent} cannot be resumed",
            f"restore study.json from a copy, or delete the folder {path.parent} to start the study again",
        )

    try:
        stored = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise damaged(" ".join(str(exc).split())[:120]) from None
    if not isinstance(stored, dict) or stored.get("schema") != SCHEMA:
        raise damaged(f"not a {SCHEMA} record")
    if not isinstance(stored.get("settings"), dict):
        raise damaged("no settings")
    truth, count = stored.get("population_ate"), stored.get("replicates", 0)
    if truth is not None and (isinstance(truth, bool) or not isinstance(truth, (int, float))
                              or not math.isfinite(truth)):
        raise damaged(f"population_ate is {truth!r}")
    if isinstance(count, bool) or not isinstance(count, int) or count < 0:
        raise damaged(f"replicates is {count!r}")
    return stored


def _short(value: Any) -> str:
    """A setting for an error message: fingerprints cut to 10 characters, tables as sorted JSON."""
    if isinstance(value, str) and len(value) == 64:
        return value[:10] + "…"
    return json.dumps(value, sort_keys=True) if isinstance(value, dict) else str(value)


def _study_seeds(out: Path, count: int) -> list[tuple[int, int, int]] | None:
    """The replicate seeds of the study in ``out`` (from study.json), None without a readable study.json."""
    try:
        seed = json.loads((out / "study.json").read_text(encoding="utf-8"))["settings"]["seed"]
        return replicate_seeds(int(seed), count)
    except (OSError, ValueError, KeyError, TypeError):
        return None


def finished_replicates(out: Path | str) -> set[int]:
    """Replicate numbers whose part is complete and intact (checksum, and the seeds study.json assigns)."""
    out = Path(out)
    return verify_parts(out, _study_seeds(out, max(part_numbers(out), default=-1) + 1))[0]


# ----------------------------------------------------------------------------------------------------------
# execution back ends
# ----------------------------------------------------------------------------------------------------------
@contextmanager
def _single_threaded_children() -> Iterator[None]:
    """Child processes started inside inherit one-thread BLAS/OpenMP settings (unless the user set them).

    Several workers on few cores would otherwise each start one thread per core; this mirrors the Dask
    nanny's default ``pre-spawn-environ``.
    """
    added = [name for name in _THREAD_VARIABLES if name not in os.environ]
    for name in added:
        os.environ[name] = "1"
    try:
        yield
    finally:
        for name in added:
            os.environ.pop(name, None)


def _run_here(tasks: list[ReplicateTask]) -> Iterator[ReplicateResult]:
    """The replicates one after the other in this process."""
    for task in tasks:
        yield run_replicate(task)


def _run_processes(tasks: list[ReplicateTask], workers: int) -> Iterator[ReplicateResult]:
    """Local processes (spawn start method); results in completion order."""
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                               initializer=_child_setup, initargs=(not library_noise_shown(),))
    try:
        with _single_threaded_children():
            futures = {pool.submit(run_replicate, task): task.replicate for task in tasks}
        for future in futures_completed(futures):
            try:
                yield future.result()
            except BrokenProcessPool:
                raise _lost_worker(futures[future]) from None
    except BaseException:  # an error or Ctrl-C here or in the caller: stop the running replicates at once
        for process in list((getattr(pool, "_processes", None) or {}).values()):
            process.terminate()
        pool.shutdown(wait=False, cancel_futures=True)
        raise
    pool.shutdown(wait=True)


def _child_setup(hide_warnings: bool) -> None:
    """In a worker process: Ctrl-C is the parent's to handle (no traceback from every child), and library
    warnings stay quiet unless the user asked for them (``--verbose``)."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    if hide_warnings:
        warnings.simplefilter("ignore")


def _lost_worker(replicate: int | None, detail: str = "") -> SiteproofError:
    """The error when a worker process dies, naming the replicate it was running."""
    where = f" while running replicate {replicate}" if replicate is not None else ""
    return SiteproofError(
        f"a worker process died{where}{detail}",
        "rerun the same command: finished replicates are kept and only the missing ones run",
    )


def _run_dask(tasks: list[ReplicateTask], client: Any) -> Iterator[ReplicateResult]:
    """Tasks on a Dask client (a LocalCluster or a running scheduler); results in completion order.

    A task whose worker dies is rescheduled on another worker by Dask itself; it fails only after the
    scheduler's allowed number of worker deaths (``distributed.scheduler.allowed-failures``).
    """
    from dask.distributed import as_completed
    from distributed.scheduler import KilledWorker

    futures = {client.submit(run_replicate, task, pure=False): task.replicate for task in tasks}
    try:
        for future in as_completed(futures):
            try:
                yield future.result()
            except KilledWorker as exc:
                raise _lost_worker(futures[future], f" repeatedly ({exc})") from None
    finally:
        client.cancel(list(futures))


@contextmanager
def _dask_logs_quiet() -> Iterator[None]:
    """Without ``--verbose``, Dask's informational logs (here and in the worker processes it starts) are
    held back: only errors reach stderr."""
    if library_noise_shown():
        yield
        return
    added = "DASK_LOGGING__DISTRIBUTED" not in os.environ
    if added:
        os.environ["DASK_LOGGING__DISTRIBUTED"] = "error"
    logger = logging.getLogger("distributed")
    level = logger.level
    logger.setLevel(logging.ERROR)
    try:
        yield
    finally:
        logger.setLevel(level)
        if added:
            os.environ.pop("DASK_LOGGING__DISTRIBUTED", None)


@contextmanager
def _dask_client(workers: int, scheduler: str | None) -> Iterator[Any]:
    """None without a scheduler; a client of a new LocalCluster with single-threaded workers
    (``"local"``); or a client of the scheduler at ``scheduler`` — connected before anything is written,
    so an unreachable address leaves no files behind."""
    if scheduler is None:
        yield None
        return
    with _dask_logs_quiet():
        from dask.distributed import Client, LocalCluster

        if scheduler == "local":
            with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                              dashboard_address=":0") as cluster, Client(cluster) as client:
                yield client
            return
        try:
            client = Client(scheduler, timeout=SCHEDULER_TIMEOUT)
        except (OSError, TimeoutError, ValueError) as exc:
            raise SiteproofError(
                f"cannot reach a Dask scheduler at {scheduler} ({type(exc).__name__})",
                "start one with `dask scheduler` and `dask worker ADDRESS`, or use --scheduler local",
            ) from None
        with client:
            yield client


def _results(tasks: list[ReplicateTask], workers: int, client: Any) -> Iterator[ReplicateResult]:
    """Replicate results from the back end the arguments ask for (Dask, local processes or this process)."""
    if client is not None:
        return _run_dask(tasks, client)
    if workers > 1 and len(tasks) > 1:
        return _run_processes(tasks, workers)
    return _run_here(tasks)


# ----------------------------------------------------------------------------------------------------------
# the study
# ----------------------------------------------------------------------------------------------------------
@dataclass
class StudyResult:
    """What a study run left in ``out_dir``: R finished replicates (``ran`` of them in this call)."""

    out_dir: Path
    design: str
    n: int
    seed: int
    replicates: int
    ran: int
    reused: int
    seconds: float
    population_ate: float
    summary: pd.DataFrame = field(repr=False)
    recomputed: tuple[int, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {"out_dir": str(self.out_dir), "design": self.design, "n": self.n, "seed": self.seed,
                "replicates": self.replicates, "ran": self.ran, "reused": self.reused,
                "seconds": self.seconds, "population_ate": self.population_ate,
                "recomputed": list(self.recomputed)}


def _check_arguments(replicates: int, n: int | None, workers: int, seed: int, scheduler: str | None) -> None:
    """Refuse counts, sizes, seeds and scheduler addresses that cannot run, naming the command-line option."""
    def whole(value: Any) -> bool:
        return isinstance(value, (int, np.integer)) and not isinstance(value, bool)

    if not whole(replicates) or replicates < 1:
        raise SiteproofError(f"--replicates {replicates!r} is not a whole number ≥ 1", "ask for e.g. --replicates 500")
    if n is not None and (not whole(n) or n < MIN_N):
        raise SiteproofError(f"--n {n!r} is not a whole number ≥ {MIN_N}", "give e.g. --n 3000 or leave --n out")
    if not whole(workers) or workers < 1:
        raise SiteproofError(f"--workers {workers!r} is not a whole number ≥ 1", "give e.g. --workers 2")
    check_seed(seed)
    if scheduler is not None and scheduler != "local" and "://" not in scheduler and ":" not in scheduler:
        raise SiteproofError(f"--scheduler {scheduler!r} is neither 'local' nor an address",
                             "use --scheduler local or --scheduler tcp://HOST:PORT")


def run_study(
    design: str | Path | Scenario,
    replicates: int,
    out: str | Path,
    *,
    n: int | None = None,
    workers: int = 1,
    scheduler: str | None = None,
    seed: int = 0,
    config: BlindConfig | None = None,
    site_learner: Any = None,
    progress: ProgressFactory | None = None,
    report: bool = True,
    clusters: bool = True,
) -> StudyResult:
    """Run (or resume) a Monte Carlo design study of ``replicates`` replicates into the folder ``out``.

    ``design``: a shipped scenario name, a scenario TOML path or a loaded :class:`Scenario`; ``n``: units per
    replicate (default: the scenario's ``default_n``); ``workers``: local processes, or LocalCluster workers with
    ``scheduler = "local"``; ``scheduler``: None (local processes), ``"local"`` or a Dask scheduler address;
    ``seed``: the study seed (same seed ⇒ identical replicates.csv); ``config``: the blind settings and
    learners (default ``BlindConfig()``; tests pass fast learners); ``site_learner``: unmask's site classifier;
    ``progress``: a factory like :func:`siteproof.core.console.progress_bar` — called as
    ``progress("replicates", total)`` and used as a context manager yielding ``tick(label)``; ``clusters``:
    analyse a clustered scenario with its cluster column (False: ignore it, to measure what that costs).
    """
    _check_arguments(replicates, n, workers, seed, scheduler)
    design = design if isinstance(design, Scenario) else load_design(design)
    n = design.default_n if n is None else int(n)
    config = config or BlindConfig()
    config.validate()
    out = Path(out)
    settings = study_settings(design, n, seed, config, clusters)
    stored = _open_folder(out, settings)
    with _dask_client(workers, scheduler) as client:
        truth = stored.get("population_ate")
        if truth is None:
            truth = population_ate(design)
        atomic_write_json(out / "study.json", {
            "schema": SCHEMA, "version": VERSION, "siteproof_version": __version__, "settings": settings,
            "replicates": max(int(replicates), int(stored.get("replicates", 0))), "population_ate": truth,
            "truth_note": "coverage, bias and RMSE of ATE rows use the population ATE (population_ate: mean τ of "
                          "200,000 fresh units); covered_sample uses the mean τ of each replicate's own units",
            "design": design.to_dict(),
        })
        seeds = replicate_seeds(seed, replicates)
        done, bad = verify_parts(out, seeds)
        discard_parts(out, bad)
        tasks = [ReplicateTask(design, n, r, seeds[r], truth, config, site_learner, clusters)
                 for r in range(replicates) if r not in done]
        start = time.perf_counter()
        with (progress or _quiet)("replicates", len(tasks)) as tick, \
                closing(_results(tasks, workers, client)) as results:
            for result in results:
                save_part(out, result.replicate, result.rows, seeds[result.replicate], result.seconds,
                          result.worker)
                tick(f"replicate {result.replicate}")
    frame = collect(out, replicates, seeds)
    summary = summarize(frame)
    atomic_write_text(out / "summary.csv", summary.to_csv(index=False, lineterminator="\n"))
    if report:
        from .experimentpage import write_study_report

        write_study_report(out, summary, json.loads((out / "study.json").read_text(encoding="utf-8")))
    return StudyResult(out, design.name, n, seed, replicates, len(tasks), replicates - len(tasks),
                       time.perf_counter() - start, float(truth), summary, tuple(sorted(bad)))


@contextmanager
def _quiet(description: str, total: int) -> Iterator[Tick]:
    """The progress factory that shows nothing."""
    yield lambda label="": None

