"""Sealing a holdout benchmark: a multi-site trial becomes a public exam and a sealed key.

The raw table is first put through the leak audit (:mod:`siteproof.benchmark.leakaudit`); a flagged column
stops sealing unless it is kept (acknowledged) or dropped, and a row order that predicts the site stops it until
the teacher confirms it. The usable units of the cells that have a design-based truth (≥ 2 units in each arm)
are shuffled, given random tokens and split into published (``train``) and held-out (``test``) units. These
three draws come from a 256-bit **sealing secret** taken from the operating system's secure randomness
(:mod:`secrets`), kept only in ``key/secret.txt``: nothing a student holds (the public file, the source code,
the seed) lets them be regenerated, so the public row order and the tokens say nothing about the source file's
order. The seed drives every statistical step (audit folds, key-side outcome models, grading half-samples).

``public/`` gets the data without site, stratum or id (outcome, treatment as 0/1, the covariates as they were,
the cost) with the outcome and treatment of the held-out units left blank, a task sheet and submission
templates; ``key/`` gets token → site and known rate, the outcome models the grader needs, the design-based
truths, the audit table, the SHA-256 of the public data file, the seed and the secret, all under a SHA-256 of
the key's own content. By default 30 % of the units are held out and only they are graded, so no prediction can
lean on a graded unit's own outcome; ``holdout_share=0`` grades every (published) unit in-sample.

Nothing that names a site (site, stratum, id, known rate) goes into ``public/``.

**Clusters.** When the study declares a cluster column, the holdout is drawn over whole clusters (clusters in a
secret random order are held out until round(share·n) units are reached), so no cluster has units on both sides
and grading by cluster sums is honest. The public file carries a ``cluster`` column holding a fresh random token
per cluster, drawn from the sealing secret like the unit tokens. Students need the grouping (grouped
cross-fitting, cluster-robust SEs), so the column is kept rather than dropped; the token is not derived from the
label (no hash, no order): it is a random string, so neither its value nor its sort order says anything about the
label or the site. What the grouping itself reveals — the cluster sizes — is audited by
:func:`~siteproof.benchmark.leakaudit.audit_cluster_tokens`. The key records each unit's cluster label.
"""

from __future__ import annotations

import hashlib
import re
import secrets
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..core.clusters import cluster_codes
from ..core.errors import SiteproofError, warn
from ..core.estimates import Estimate
from ..core.outputs import StagedOutput, atomic_write_bytes, atomic_write_text
from ..intake.roles import check_columns
from ..intake.sitetrials import DesignATE, design_ate
from ..intake.study import Study, StudySpec, load_study, read_table
from .key import fit_key_units, key_metadata, write_key
from .layout import (CLUSTER, DEFAULT_HOLDOUT_SHARE, PART, PUBLIC_DATA, TASK_SHEET, TEMPLATE_CSV, TEMPLATE_TOML,
                     TOKEN,
                     refuse_earlier)
from .leakaudit import LeakAudit, audit_cluster_tokens, audit_columns, audit_public, require_no_leaks
from .tasksheet import task_sheet, template_csv, template_toml

_TOKEN_ALPHABET = np.array(list("abcdefghjkmnpqrstuvwxyz23456789"))
_TOKEN_FIRST = np.array(list("abcdfghjkmnpqrstuvwxyz"))  # a letter other than e: never read as a number
_TOKEN_LENGTH = 10
_MIN_GRADED = 20
SECRET_BITS = 256
_SECRET_PATTERN = re.compile(r"^[0-9a-f]{64}$")


@dataclass(frozen=True)
class SealResult:
    """What :func:`seal_benchmark` wrote: paths, sizes, the audit and the design-based truth."""

    out_dir: Path
    public_sha256: str
    n: int
    n_graded: int
    seed: int
    holdout_share: float
    audit: LeakAudit
    design_ate: Estimate
    published_columns: tuple[str, ...]
    warnings: tuple[str, ...]

    @property
    def benchmark_id(self) -> str:
        """The first 12 hex digits of the public file's SHA-256."""
        return self.public_sha256[:12]

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary of the sealing."""
        return {
            "out_dir": str(self.out_dir), "benchmark_id": self.benchmark_id, "public_sha256": self.public_sha256,
            "n": self.n, "n_graded": self.n_graded, "seed": self.seed, "holdout_share": self.holdout_share,
            "published_columns": list(self.published_columns), "design_ate": self.design_ate.to_dict(),
            "audit": self.audit.to_dict(), "warnings": list(self.warnings),
        }


def seal_benchmark(
    spec: StudySpec,
    out_dir: Path | str,
    *,
    holdout_share: float = DEFAULT_HOLDOUT_SHARE,
    secret_file: Path | str | None = None,
    accept_row_order: bool = False,
    folds: int = 5,
    learners: Any = None,
    force: bool = False,
) -> SealResult:
    """Audit, then write ``out_dir/public/`` (exam) and ``out_dir/key/`` (sealed key); see the module docstring.

    ``spec.keep_columns`` acknowledges flagged columns, ``spec.drop_columns`` and ``spec.site_derived`` leave
    columns out; ``accept_row_order`` confirms a source row order that predicts the site. ``spec.seed`` drives
    the statistical steps (audit folds, outcome models); the shuffle, tokens and holdout split come from a fresh
    secret, or from ``secret_file`` (e.g. an earlier ``key/secret.txt``), which reproduces that seal byte for
    byte. ``learners`` is passed to :func:`~siteproof.blind.nuisance.cross_fit_nuisances` for the key-side
    outcome models.
    """
    _check_holdout_share(holdout_share)
    secret = read_secret(secret_file) if secret_file is not None else secrets.token_hex(SECRET_BITS // 8)
    out = Path(out_dir)
    _check_bench_dir(out, force)
    frame = read_table(spec.data, spec.encoding)
    check_columns(spec, frame)  # named columns, nested values and huge magnitudes, before the audit fits models
    audit = _audit(frame, spec, accept_row_order)
    require_no_leaks(audit)
    study = load_study(spec, frame=frame)
    units, design, notes = _benchmark_units(study)
    rng = np.random.default_rng(int(secret, 16))  # the secret, never the seed: see the module docstring
    units = units[rng.permutation(units.size)]
    tokens = _tokens(rng, units.size)
    if study.cluster is None:
        graded = _holdout_mask(rng, units.size, holdout_share)
        cluster_tokens = None
    else:
        codes, _ = cluster_codes(np.asarray(study.cluster, dtype=object)[units])
        graded = _cluster_holdout_mask(rng, codes, holdout_share)
        cluster_tokens = _tokens(rng, int(codes.max()) + 1)[codes]
    public = _public_frame(study, units, tokens, graded, holdout_share > 0, cluster_tokens)
    audit = replace(audit, rows=audit.rows + audit_public(
        public, study.site[units], [TOKEN] + ([PART] if holdout_share > 0 else []), spec.seed))
    if cluster_tokens is not None:
        audit = replace(audit, rows=audit.rows + audit_cluster_tokens(cluster_tokens, study.site[units], spec.seed))
    require_no_leaks(audit)
    public_bytes = public.to_csv(index=False, lineterminator="\n").encode("utf-8")
    sha = hashlib.sha256(public_bytes).hexdigest()
    key_units, nuisance_summary = fit_key_units(study, units, tokens, graded, folds, learners)
    meta = key_metadata(study, spec, audit, design, sha, key_units, public, holdout_share, nuisance_summary, notes)
    with StagedOutput(out, force=True) as staged:
        atomic_write_bytes(staged / "public" / PUBLIC_DATA, public_bytes)
        atomic_write_text(staged / "public" / TASK_SHEET, task_sheet(meta))
        atomic_write_text(staged / "public" / TEMPLATE_CSV, template_csv(tokens))
        atomic_write_text(staged / "public" / TEMPLATE_TOML, template_toml(meta))
        write_key(staged / "key", meta, key_units, audit, secret)
    return SealResult(
        out_dir=out, public_sha256=sha, n=int(units.size), n_graded=int(graded.sum()), seed=int(spec.seed),
        holdout_share=float(holdout_share), audit=audit, design_ate=design.estimate,
        published_columns=tuple(public.columns), warnings=tuple(list(study.warnings) + notes),
    )


def read_secret(path: Path | str) -> str:
    """The sealing secret (64 lower-case hex digits, 256 bits) from a text file such as ``key/secret.txt``."""
    source = Path(path)
    try:
        text = source.read_text(encoding="utf-8").strip()
    except (OSError, UnicodeDecodeError) as exc:
        raise SiteproofError(f"cannot read the secret file {source} ({exc})",
                             "give the key/secret.txt of the seal to reproduce") from None
    if not _SECRET_PATTERN.match(text):
        raise SiteproofError(f"secret file {source} does not hold a sealing secret (64 hex digits)",
                             "give the key/secret.txt written by `siteproof seal`, unchanged")
    return text


def _check_holdout_share(share: float) -> None:
    """Refuse a holdout share outside [0, 1)."""
    if isinstance(share, bool) or not (isinstance(share, (int, float)) and 0.0 <= share < 1.0):
        raise SiteproofError(f"the holdout share is {share!r}",
                             f"give a share in [0, 1) (default {DEFAULT_HOLDOUT_SHARE}; 0 grades every unit "
                             "in-sample)")


def _check_bench_dir(out: Path, force: bool) -> None:
    """Refuse an output path that is a file, or a folder holding an earlier benchmark (unless ``force``)."""
    if out.exists() and not out.is_dir():
        raise SiteproofError(f"output path {out} is a file, not a folder", "name a folder with --out")
    refuse_earlier(out, ("public", "key"), "a benchmark", force)


def _audit(frame: pd.DataFrame, spec: StudySpec, accept_row_order: bool) -> LeakAudit:
    """Leak audit of every column the public file could hold: covariates (declared or all others) and cost."""
    roles = {spec.outcome, spec.treatment, spec.site, spec.id, spec.stratum, spec.cost, spec.cluster} - {None}
    drop = list(spec.drop_columns) + list(spec.site_derived)
    if spec.covariates is not None:
        columns = list(dict.fromkeys(spec.covariates))
    else:
        columns = [c for c in frame.columns if c not in roles]
    columns += [c for c in drop if c not in columns and c not in roles]
    if spec.cost is not None:
        columns.append(spec.cost)
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise SiteproofError(f"column {missing[0]!r} is not in the data", f"name one of: {', '.join(frame.columns)}")
    return audit_columns(frame, spec.site, columns, keep=spec.keep_columns, drop=drop, seed=spec.seed,
                         accept_row_order=accept_row_order, cluster=spec.cluster)


def _benchmark_units(study: Study) -> tuple[np.ndarray, DesignATE, list[str]]:
    """Indices of the usable units in cells with a design-based truth, the design ATE, and a note if any left."""
    design = design_ate(study.blind.y, study.blind.w, study.site, study.stratum)
    units = np.flatnonzero(design.included)
    notes = []
    left = study.n - units.size
    if left:
        notes.append(f"{left} units of cells with fewer than 2 units in an arm have no design-based truth and are "
                     "left out of the benchmark")
        warn(notes[-1])
    n_sites = pd.unique(study.site[units]).size
    if n_sites < 2:
        raise SiteproofError(f"the benchmark units come from {n_sites} site only",
                             "a site-hidden benchmark needs at least 2 sites with units in both arms")
    if units.size < _MIN_GRADED:
        raise SiteproofError(f"only {units.size} units have a design-based truth",
                             f"a benchmark needs at least {_MIN_GRADED}; check the site and treatment columns")
    return units, design, notes


def _tokens(rng: np.random.Generator, n: int) -> np.ndarray:
    """n distinct random tokens of 10 characters: lower-case letters and digits without look-alikes (i, l, o,
    0, 1), starting with a letter other than e so that no spreadsheet reads a token as a number."""
    def draw(k: int) -> list[str]:
        first = rng.choice(_TOKEN_FIRST, size=k)
        rest = rng.choice(_TOKEN_ALPHABET, size=(k, _TOKEN_LENGTH - 1))
        return [a + "".join(row) for a, row in zip(first, rest)]

    tokens = np.array(draw(n), dtype=object)
    while True:
        dup = pd.Series(tokens).duplicated().to_numpy()
        if not dup.any():
            return tokens
        tokens[dup] = draw(int(dup.sum()))


def _holdout_mask(rng: np.random.Generator, n: int, share: float) -> np.ndarray:
    """True for graded units: all units, or a random round(share·n) of them (outcome hidden in public)."""
    if share == 0:
        return np.ones(n, dtype=bool)
    k = int(round(share * n))
    if k < _MIN_GRADED:
        raise SiteproofError(f"a holdout share of {share} grades only {k} units",
                             f"raise the share so that at least {_MIN_GRADED} units are graded")
    graded = np.zeros(n, dtype=bool)
    graded[rng.choice(n, size=k, replace=False)] = True
    return graded


def _cluster_holdout_mask(rng: np.random.Generator, codes: np.ndarray, share: float) -> np.ndarray:
    """True for graded units, held out by whole clusters: clusters in a random order until round(share·n) units.

    ``codes`` are cluster codes 0..G−1 of the (shuffled) units. With share 0 every unit is graded.
    """
    n = codes.size
    if share == 0:
        return np.ones(n, dtype=bool)
    target = int(round(share * n))
    sizes = np.bincount(codes)
    order = rng.permutation(sizes.size)
    reached = np.cumsum(sizes[order])
    take = order[: int(np.searchsorted(reached, target)) + 1]
    graded = np.isin(codes, take)
    if graded.sum() < _MIN_GRADED or graded.all():
        raise SiteproofError(f"a holdout share of {share} over {sizes.size} clusters grades {int(graded.sum())} "
                             f"of {n} units", f"choose a share that holds out at least {_MIN_GRADED} units and "
                             "leaves at least one cluster published")
    return graded


def _public_frame(
    study: Study, units: np.ndarray, tokens: np.ndarray, graded: np.ndarray, holdout: bool,
    cluster_tokens: np.ndarray | None = None,
) -> pd.DataFrame:
    """token, [part], [cluster], outcome, treatment (0/1), covariates as in the data, cost — no site, stratum,
    id or cluster label (the cluster column holds random per-cluster tokens)."""
    blind = study.blind
    names = [blind.outcome, blind.treatment, *blind.covariates] + ([study.spec.cost] if blind.cost is not None else [])
    clash = [c for c in names if c in (TOKEN, PART, CLUSTER)]
    if clash:
        raise SiteproofError(f"column {clash[0]!r} has a name the public file reserves",
                             f"rename it in the data (the public file uses '{TOKEN}', '{PART}' and '{CLUSTER}')")
    y = pd.Series(blind.y[units]).astype("Int64" if blind.binary_outcome else "Float64")
    w = pd.Series(blind.w[units]).astype("Int64")
    if holdout:
        y[graded] = pd.NA
        w[graded] = pd.NA
    columns: dict[str, Any] = {TOKEN: tokens}
    if holdout:
        columns[PART] = np.where(graded, "test", "train")
    if cluster_tokens is not None:
        columns[CLUSTER] = cluster_tokens
    columns[blind.outcome] = y.array  # nullable arrays: integers stay integers next to empty cells
    columns[blind.treatment] = w.array
    frame = pd.DataFrame(columns)
    raw = blind.raw_covariates.iloc[units].reset_index(drop=True)
    frame = pd.concat([frame, raw], axis=1)
    if blind.cost is not None:
        frame[study.spec.cost] = blind.cost[units]
    return frame
