"""Holdout benchmarks: seal a multi-site trial into a public exam file and a sealed key, grade submissions.

**Seal** (:func:`seal_benchmark`). The raw table is first put through the leak audit
(:mod:`siteproof.benchmark.leakaudit`); a flagged column stops sealing unless it is kept (acknowledged) or dropped. The
usable units of the cells that have a design-based truth (≥ 2 units in each arm) are shuffled and given random
tokens. ``public/`` gets the data without site, stratum or id (outcome, treatment as 0/1, the covariates as
they were, the cost), a task sheet and submission templates; ``key/`` gets token → site and known rate, the
outcome models the grader needs, the design-based truths, the audit table, the SHA-256 of the public data file
and the seed. With ``holdout_share`` > 0 a random share of the units has its outcome and treatment left blank in
the public file; only those units are graded, so no prediction can lean on the graded unit's own outcome.

**Grade** (:func:`grade_submissions`). The scores are design-based (design.md point 3): with the known rate
e_S and outcome models μ̂₀, μ̂₁ cross-fitted on the key side from X only, the oracle doubly robust arm scores
(Robins, Rotnitzky & Zhao 1994)

    Γ₁ = μ̂₁(X) + W (Y − μ̂₁(X)) / e_S,    Γ₀ = μ̂₀(X) + (1 − W)(Y − μ̂₀(X)) / (1 − e_S),    Γ = Γ₁ − Γ₀

are unbiased for the unit's effect given (X, S) whatever μ̂ is, so every metric of a submission made from X
alone is honest:

* **AUTOC** and **Qini coefficient** of the τ̂ ranking scored with Γ (Yadlowsky, Fleming, Shah, Brunskill &
  Wager, rank-weighted average treatment effects), half-sample bootstrap SE (``evaluation.rank_metric``);
* **BLP β₂**: the heterogeneity loading of τ̂ in the weighted regression of Y on [1, μ̂₀, W − e_S,
  (W − e_S)(τ̂ − τ̄)] with weights 1/(e_S(1 − e_S)), HC2 SE (Chernozhukov, Demirer, Duflo & Fernández-Val);
* **rule gain** of the submitted ``treat`` over random allocation with the same treated share q̂,
  mean[(π − q̂)(D − D̄)] with D = Γ₁ − Γ₀ − cost (Imai & Li 2023), SE from its influence function;
* **ATE error**: submitted ATE − design-based pooled ATE Σ_s (n_s/n)·DiM_s (design.md point 1), SE that of the
  design ATE (the submission is one number, so there are no per-unit scores to pair with); and whether the
  submitted 95 % CI covers the design ATE.

**Ties.** Submissions are ordered by the chosen metric. Walking down the order, each submission is compared with
the best submission of the current group through their paired difference: the ranking metric is recomputed on the
same n_boot half-samples for every submission (``evaluation.half_samples``), and the SE of a difference is the SD
of the replicate differences (design.md point 4: never add two variances of estimates made on the same units). When
the difference is within 1.96 SEs the submission joins the group (same rank, ``tied_with`` names the group's
best); otherwise it opens a new group with its own position as rank (competition ranking: 1, 1, 3).

Nothing that names a site leaves the grader unless ``reveal=True``.
"""

from __future__ import annotations

import hashlib
import html
import json
import math
import sys
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Callable, Iterable, Sequence

import numpy as np
import pandas as pd
from rich.table import Table
from sklearn.dummy import DummyClassifier, DummyRegressor

from .. import __version__
from ..intake.sitetrials import DesignATE, design_ate, natural_key, site_table
from ..core.errors import SiteproofError, warn
from ..core.estimates import Z95, Estimate, normal_ci
from ..blind.evaluation import blp, half_samples, rank_metric
from .leakaudit import LeakAudit, audit_columns, require_no_leaks
from ..blind.nuisance import cross_fit_nuisances, make_folds
from ..core.outputs import StagedOutput, atomic_write_bytes, atomic_write_json, atomic_write_text, to_json_text
from ..blind.rules import rule_value
from ..core.scores import arm_scores
from ..intake.study import Study, StudySpec, load_study, read_table
from ..reporting.theme import page_head

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

KEY_SCHEMA = "siteproof/holdout-key"
LEADERBOARD_SCHEMA = "siteproof/leaderboard"
FORMAT_VERSION = 1
TOKEN = "token"
PART = "part"
PUBLIC_DATA = "data.csv"
TASK_SHEET = "task.md"
TEMPLATE_CSV = "submission_template.csv"
TEMPLATE_TOML = "submission_template.toml"
KEY_FILE = "key.json"
KEY_UNITS = "units.csv"
KEY_AUDIT = "leak_audit.csv"
LEADERBOARD_FILES = ("leaderboard.csv", "leaderboard.json", "leaderboard.html", "sites.csv")
_TOKEN_ALPHABET = np.array(list("abcdefghjkmnpqrstuvwxyz23456789"))
_TOKEN_FIRST = np.array(list("abcdfghjkmnpqrstuvwxyz"))  # a letter other than e: never read as a number
_TOKEN_LENGTH = 10
_MIN_GRADED = 20
_FOREIGN_SHARE = 0.5


@dataclass(frozen=True)
class MetricInfo:
    """A grading metric: its label, what the submission needs for it, and which direction is better."""

    label: str
    needs: str
    higher_is_better: bool
    meaning: str


METRICS: dict[str, MetricInfo] = {
    "autoc": MetricInfo("AUTOC", "tau_hat", True,
                        "area under the targeting operator characteristic of the tau_hat ranking"),
    "qini": MetricInfo("Qini", "tau_hat", True, "Qini coefficient of the tau_hat ranking"),
    "blp_beta2": MetricInfo("BLP β₂", "tau_hat", True,
                            "heterogeneity loading of tau_hat (1 = calibrated, 0 = no information)"),
    "rule_gain": MetricInfo("rule gain", "treat", True,
                            "gain of the treat rule over random allocation with the same treated share"),
    "ate_error": MetricInfo("ATE error", "ate", False,
                            "submitted average effect minus the design-based pooled ATE (ranked by |error|)"),
}


TIE_RULE = ("a submission is tied with the best submission of its group when their paired difference in the "
            "ranking metric is within 1.96 standard errors (SD of the difference over shared half-samples); tied "
            "submissions share the group's rank")


# ═════════════════════════════════════ seal ═════════════════════════════════════


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
        return self.public_sha256[:12]

    def to_dict(self) -> dict[str, Any]:
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
    holdout_share: float = 0.0,
    folds: int = 5,
    learners: Any = None,
    force: bool = False,
) -> SealResult:
    """Audit, then write ``out_dir/public/`` (exam) and ``out_dir/key/`` (sealed key); see the module docstring.

    ``spec.keep_columns`` acknowledges flagged columns, ``spec.drop_columns`` and ``spec.site_derived`` leave
    columns out; ``spec.seed`` drives every random step (audit folds, shuffle, tokens, holdout split, outcome
    models), so the same seed writes byte-identical files. ``learners`` is passed to
    :func:`~siteproof.blind.nuisance.cross_fit_nuisances` for the key-side outcome models.
    """
    _check_holdout_share(holdout_share)
    out = Path(out_dir)
    _check_bench_dir(out, force)
    frame = read_table(spec.data, spec.encoding)
    audit = _audit(frame, spec)
    require_no_leaks(audit)
    study = load_study(spec, frame=frame)
    units, design, notes = _benchmark_units(study)
    rng = np.random.default_rng(spec.seed)
    order = rng.permutation(units.size)
    units = units[order]
    tokens = _tokens(rng, units.size)
    graded = _holdout_mask(rng, units.size, holdout_share)
    public = _public_frame(study, units, tokens, graded, holdout_share > 0)
    public_bytes = public.to_csv(index=False, lineterminator="\n").encode("utf-8")
    sha = hashlib.sha256(public_bytes).hexdigest()
    key_units, nuisance_summary = _key_units(study, units, tokens, graded, folds, learners)
    meta = _key_meta(study, spec, audit, design, sha, key_units, public, holdout_share, nuisance_summary, notes)
    with StagedOutput(out, force=True) as staged:
        atomic_write_bytes(staged / "public" / PUBLIC_DATA, public_bytes)
        atomic_write_text(staged / "public" / TASK_SHEET, task_sheet(meta))
        atomic_write_text(staged / "public" / TEMPLATE_CSV, _template_csv(tokens))
        atomic_write_text(staged / "public" / TEMPLATE_TOML, _template_toml(meta))
        atomic_write_json(staged / "key" / KEY_FILE, meta)
        atomic_write_text(staged / "key" / KEY_UNITS, key_units.to_csv(index=False, lineterminator="\n"))
        atomic_write_text(staged / "key" / KEY_AUDIT, audit.to_frame().to_csv(index=False, lineterminator="\n"))
    return SealResult(
        out_dir=out, public_sha256=sha, n=int(units.size), n_graded=int(graded.sum()), seed=int(spec.seed),
        holdout_share=float(holdout_share), audit=audit, design_ate=design.estimate,
        published_columns=tuple(public.columns), warnings=tuple(list(study.warnings) + notes),
    )


def _check_holdout_share(share: float) -> None:
    if not (isinstance(share, (int, float)) and 0.0 <= share < 1.0):
        raise SiteproofError(f"the holdout share is {share!r}",
                             "give a share in [0, 1), e.g. 0.3 (0 grades every unit)")


def _check_bench_dir(out: Path, force: bool) -> None:
    if out.exists() and not out.is_dir():
        raise SiteproofError(f"output path {out} is a file, not a folder", "name a folder with --out")
    earlier = [name for name in ("public", "key") if (out / name).exists()]
    if earlier and not force:
        raise SiteproofError(f"output folder {out} already holds a benchmark ({', '.join(earlier)})",
                             "choose another --out folder or add --force to overwrite it")


def _audit(frame: pd.DataFrame, spec: StudySpec) -> LeakAudit:
    """Leak audit of every column the public file could hold: covariates (declared or all others) and cost."""
    roles = {spec.outcome, spec.treatment, spec.site, spec.id, spec.stratum, spec.cost} - {None}
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
    return audit_columns(frame, spec.site, columns, keep=spec.keep_columns, drop=drop, seed=spec.seed)


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


def _public_frame(
    study: Study, units: np.ndarray, tokens: np.ndarray, graded: np.ndarray, holdout: bool,
) -> pd.DataFrame:
    """token, [part], outcome, treatment (0/1), covariates as in the data, cost — no site, stratum or id."""
    blind = study.blind
    names = [blind.outcome, blind.treatment, *blind.covariates] + ([study.spec.cost] if blind.cost is not None else [])
    clash = [c for c in names if c in (TOKEN, PART)]
    if clash:
        raise SiteproofError(f"column {clash[0]!r} has a name the public file reserves",
                             f"rename it in the data (the public file uses '{TOKEN}' and '{PART}')")
    y = pd.Series(blind.y[units]).astype("Int64" if blind.binary_outcome else "Float64")
    w = pd.Series(blind.w[units]).astype("Int64")
    if holdout:
        y[graded] = pd.NA
        w[graded] = pd.NA
    columns: dict[str, Any] = {TOKEN: tokens}
    if holdout:
        columns[PART] = np.where(graded, "test", "train")
    columns[blind.outcome] = y.array  # nullable arrays: integers stay integers next to empty cells
    columns[blind.treatment] = w.array
    frame = pd.DataFrame(columns)
    raw = blind.raw_covariates.iloc[units].reset_index(drop=True)
    frame = pd.concat([frame, raw], axis=1)
    if blind.cost is not None:
        frame[study.spec.cost] = blind.cost[units]
    return frame


def _key_units(
    study: Study, units: np.ndarray, tokens: np.ndarray, graded: np.ndarray, folds: int, learners: Any,
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Per token: row key, site, stratum, known rate, graded flag, y, w, cost and cross-fitted μ̂₀, μ̂₁.

    The grader needs only μ̂₀ and μ̂₁ (the rates are known), so ê and m̂ are fitted by constant models.
    """
    blind = study.blind
    y, w = blind.y[units], blind.w[units]
    fold_ids = make_folds(w, folds, study.spec.seed)
    unused = DummyClassifier(strategy="prior") if blind.binary_outcome else DummyRegressor()
    only_arms = {**dict(learners or {}), "propensity": DummyClassifier(strategy="prior"), "m": unused}
    nuis = cross_fit_nuisances(blind.X[units], y, w, fold_ids, binary_outcome=blind.binary_outcome,
                               learners=only_arms, seed=study.spec.seed)
    frame = pd.DataFrame({
        TOKEN: tokens, "row_key": blind.row_key[units], "site": study.site[units],
        "stratum": study.stratum[units] if study.stratum is not None else None,
        "rate": study.known_rate[units], "graded": graded.astype(int), "y": y, "w": w.astype(int),
        "cost": blind.cost[units] if blind.cost is not None else np.nan, "mu0": nuis.mu0, "mu1": nuis.mu1,
    })
    return frame, nuis.to_dict()


def _key_meta(
    study: Study, spec: StudySpec, audit: LeakAudit, design: DesignATE, sha: str, key_units: pd.DataFrame,
    public: pd.DataFrame, holdout_share: float, nuisance_summary: dict[str, Any], notes: list[str],
) -> dict[str, Any]:
    """key.json: everything about the benchmark except the per-unit table (which is units.csv)."""
    blind = study.blind
    graded = key_units["graded"].to_numpy(dtype=bool)
    return {
        "schema": KEY_SCHEMA, "version": FORMAT_VERSION, "siteproof_version": __version__,
        "name": spec.name or Path(spec.data).stem, "source_file": Path(spec.data).name,
        "seed": int(spec.seed), "public_sha256": sha, "benchmark_id": sha[:12],
        "n": int(len(key_units)), "n_graded": int(graded.sum()), "holdout_share": float(holdout_share),
        "columns": {
            "token": TOKEN, "part": PART if holdout_share > 0 else None, "outcome": blind.outcome,
            "treatment": blind.treatment, "treated_value": blind.treated_value, "binary_outcome": blind.binary_outcome,
            "covariates": list(blind.covariates), "cost": spec.cost if blind.cost is not None else None,
            "covariate_types": {c: _column_type(public[c]) for c in blind.covariates},
            "missing": {c: int(public[c].isna().sum()) for c in blind.covariates},
            "site": spec.site, "stratum": spec.stratum, "id": spec.id,
        },
        "rates_source": study.rates_source,
        "design_ate": design.to_dict(),
        "sites": _plain_records(design.by_site),
        "outcome_models": {**nuisance_summary, "fit_on": "all benchmark units, cross-fitted from X only"},
        "audit": audit.to_dict(),
        "warnings": list(study.warnings) + notes,
    }


def _column_type(values: pd.Series) -> str:
    numeric = pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values)
    return "number" if numeric else "text"


def _plain_records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    out = []
    for row in frame.to_dict("records"):
        out.append({k: (None if isinstance(v, float) and not math.isfinite(v) else
                        v.item() if isinstance(v, np.generic) else v) for k, v in row.items()})
    return out


# ─────────────────────────── task sheet and templates ───────────────────────────


def task_sheet(meta: dict[str, Any]) -> str:
    """The students' task sheet (Markdown) from the key metadata; it names no site and no rate."""
    cols = meta["columns"]
    holdout = meta["holdout_share"] > 0
    outcome_kind = "0/1" if cols["binary_outcome"] else "number"
    rows = [f"| `{TOKEN}` | random label of the unit (means nothing) | text |",]
    if holdout:
        rows.append(f"| `{PART}` | `train`: outcome and treatment given; `test`: left blank, these units are "
                    "graded | text |")
    rows.append(f"| `{cols['outcome']}` | outcome | {outcome_kind} |")
    rows.append(f"| `{cols['treatment']}` | treatment: 1 = treated (`{cols['treated_value']}` in the source data), "
                "0 = control | 0/1 |")
    for c in cols["covariates"]:
        missing = cols["missing"].get(c, 0)
        rows.append(f"| `{c}` | covariate{f' ({missing} missing)' if missing else ''} | {cols['covariate_types'][c]} |")
    if cols["cost"]:
        rows.append(f"| `{cols['cost']}` | cost of treating this unit, in outcome units | number |")
    honesty = (
        f"The {meta['n_graded']} `test` units are graded; their outcome and treatment are hidden, so your "
        "predictions for them can only use their covariates."
        if holdout else
        "Every unit is graded. A prediction for a unit must not use that unit's own outcome or treatment: fit your "
        "models on the other units (cross-fitting: split the units into folds and predict each fold from models "
        "trained on the others). In-sample predictions are graded as if they were honest and will look better "
        "than they are."
    )
    cost_note = f" minus `{cols['cost']}`" if cols["cost"] else ""
    return f"""# {meta['name']}: holdout benchmark

Benchmark id `{meta['benchmark_id']}` · SHA-256 of `{PUBLIC_DATA}`: `{meta['public_sha256']}`

## The data

`{PUBLIC_DATA}` holds {meta['n']} units of a randomized trial that was run at several sites. Within each site,
treatment was assigned at random, with a probability that differs from site to site. The site is not in the file,
so the pooled data are an observational study: treated and control units may differ in their covariates, and
the chance of treatment depends on who the unit is. Rows are in random order.

| column | meaning | type |
|---|---|---|
{chr(10).join(rows)}

Empty cells are missing values.

## What to hand in

1. **`<your name>.csv`**, one row per token — all {meta['n']} tokens, each exactly once — with the columns
   * `{TOKEN}`;
   * `tau_hat`: your prediction of the unit's treatment effect (outcome if treated minus outcome if not
     treated, in outcome units), a finite number;
   * `treat`: 1 if you would treat the unit, 0 if not (your treatment rule).

   You may leave out `tau_hat` or `treat`; the metrics that need it are then not graded.
   `{TEMPLATE_CSV}` lists every token.
2. Optionally **`<your name>.toml`** beside it, with your estimate of the average treatment effect over all
   {meta['n']} units (`{TEMPLATE_TOML}` is a template):

   ```toml
   # optional: your name on the leaderboard (default: the file name)
   name = "your name"
   # optional: the submission is refused if this is not the benchmark id above
   benchmark = "{meta['benchmark_id']}"

   [ate]
   estimate = 0.0
   se = 0.0             # standard error
   # ci = [low, high]   # optional; default estimate ± 1.96·se
   ```

{honesty}

## How it will be graded

The teacher keeps each unit's site and its site's assignment probability. With them, every metric below is
computed from the randomization itself (design-based), so it is unbiased whatever model you used:

* **AUTOC** and **Qini coefficient** of the ranking by `tau_hat`: how much larger the effect is among the units
  you rank highest than on average (0 = no better than random ordering);
* **BLP β₂**: how well `tau_hat` tracks the true differences in effects (1 = calibrated, 0 = no information);
* **rule gain** of `treat`: the average outcome{cost_note} under your rule, compared with treating the same
  share of units at random;
* **ATE error**: your average effect minus the design-based estimate, and whether your 95 % interval covers it.

Every metric is reported with its standard error. The leaderboard ranks by AUTOC unless your teacher announces
another metric. Two submissions whose difference is within its uncertainty (95 %, paired over the same units)
share a rank and are marked as tied.
"""


def _template_csv(tokens: np.ndarray) -> str:
    frame = pd.DataFrame({TOKEN: tokens, "tau_hat": "", "treat": ""})
    return frame.to_csv(index=False, lineterminator="\n")


def _template_toml(meta: dict[str, Any]) -> str:
    return (f'name = "your name"\nbenchmark = "{meta["benchmark_id"]}"\n\n[ate]\n'
            "estimate = 0.0\nse = 0.0\n# ci = [0.0, 0.0]\n")


# ═════════════════════════════════════ key ═════════════════════════════════════


@dataclass(frozen=True, eq=False)
class BenchmarkKey:
    """The sealed key: metadata (key.json) and one row per token (units.csv), in public-file order."""

    path: Path
    meta: dict[str, Any]
    units: pd.DataFrame

    @property
    def tokens(self) -> np.ndarray:
        return self.units[TOKEN].to_numpy(dtype=object)

    @property
    def benchmark_id(self) -> str:
        return str(self.meta["benchmark_id"])

    @property
    def graded(self) -> np.ndarray:
        return self.units["graded"].to_numpy(dtype=int).astype(bool)


def read_key(key_dir: Path | str) -> BenchmarkKey:
    """Read ``BENCH/key``; a folder that is not a benchmark key raises :class:`SiteproofError`."""
    path = Path(key_dir)
    meta_path, units_path = path / KEY_FILE, path / KEY_UNITS
    if not meta_path.is_file() or not units_path.is_file():
        raise SiteproofError(f"{path} is not a benchmark key folder (no {KEY_FILE} and {KEY_UNITS})",
                             "give the key/ folder written by `siteproof seal`")
    try:
        meta = json.loads(meta_path.read_text(encoding="utf-8"))
    except (ValueError, OSError) as exc:
        raise SiteproofError(f"cannot read {meta_path} ({exc})", "restore the key from the sealed copy") from None
    if meta.get("schema") != KEY_SCHEMA or meta.get("version") != FORMAT_VERSION:
        raise SiteproofError(f"{meta_path} is not a version-{FORMAT_VERSION} benchmark key",
                             "seal the benchmark again with this version of siteproof")
    units = pd.read_csv(units_path, dtype={TOKEN: str, "row_key": str, "site": str, "stratum": str},
                        keep_default_na=False, na_values=[""])
    if len(units) != meta["n"]:
        raise SiteproofError(f"{units_path} has {len(units)} rows but the key says {meta['n']}",
                             "restore the key from the sealed copy")
    return BenchmarkKey(path, meta, units)


def sha256_of(path: Path | str) -> str:
    """Hex SHA-256 of a file's bytes."""
    digest = hashlib.sha256()
    with Path(path).open("rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def verify_public(key: BenchmarkKey, public_data: Path | str) -> None:
    """Refuse a public data file whose SHA-256 differs from the one sealed in the key."""
    actual = sha256_of(public_data)
    if actual != key.meta["public_sha256"]:
        raise SiteproofError(
            f"{public_data} was changed after sealing (SHA-256 {actual[:12]}… instead of {key.benchmark_id}…)",
            "restore the public file that was handed out, or seal the benchmark again",
        )


def _public_check(key: BenchmarkKey, public_data: Path | str | None) -> str:
    """Verify the public file (given, or ``key/../public/data.csv``); say what was checked."""
    path = Path(public_data) if public_data is not None else key.path.parent / "public" / PUBLIC_DATA
    if not path.is_file():
        if public_data is not None:
            raise SiteproofError(f"public data file {path} not found", "give the data.csv that was handed out")
        return "public data file not found beside the key; its SHA-256 was not checked"
    verify_public(key, path)
    return "public data file matches the sealed SHA-256"


# ═════════════════════════════════════ submissions ═════════════════════════════════════


@dataclass(frozen=True)
class SubmittedATE:
    """The average-effect estimate of a submission's TOML: estimate, SE and 95 % CI."""

    estimate: float
    se: float
    ci: tuple[float, float]

    def to_dict(self) -> dict[str, Any]:
        return {"estimate": self.estimate, "se": self.se, "ci": list(self.ci)}


@dataclass(frozen=True, eq=False)
class Submission:
    """A validated submission, its columns aligned to the key's token order."""

    name: str
    path: Path
    tau_hat: np.ndarray | None
    treat: np.ndarray | None
    ate: SubmittedATE | None


def submission_files(paths: Iterable[Path | str]) -> list[Path]:
    """The CSV files among ``paths``; a folder contributes its ``*.csv`` files in name order."""
    files: list[Path] = []
    for raw in paths:
        path = Path(raw)
        if path.is_dir():
            found = sorted(p for p in path.glob("*.csv") if p.is_file())
            if not found:
                raise SiteproofError(f"folder {path} holds no .csv submission",
                                     "give submission CSV files or their folder")
            files.extend(found)
        elif path.is_file():
            files.append(path)
        else:
            raise SiteproofError(f"submission {path} not found", "check the path")
    if not files:
        raise SiteproofError("no submissions given", "name at least one submission CSV or a folder of them")
    return files


def read_submission(path: Path | str, key: BenchmarkKey) -> Submission:
    """Read and validate one submission CSV (and its optional TOML beside it) against the key.

    Checks: a ``token`` column; ``tau_hat`` and/or ``treat``; every token of the benchmark exactly once and no
    other token (a file whose tokens mostly do not belong to the benchmark was made for another public file);
    finite ``tau_hat``; ``treat`` in {0, 1}. Every failure raises :class:`SiteproofError` naming the file.
    """
    path = Path(path)
    frame = _read_submission_csv(path)
    if TOKEN not in frame.columns:
        raise SiteproofError(f"submission {path.name} has no '{TOKEN}' column (columns: {', '.join(frame.columns)})",
                             f"start the file with the '{TOKEN}' column of {TEMPLATE_CSV}")
    if "tau_hat" not in frame.columns and "treat" not in frame.columns:
        raise SiteproofError(f"submission {path.name} has neither a 'tau_hat' nor a 'treat' column",
                             "add tau_hat (predicted effects) and/or treat (0/1) as in the task sheet")
    position = _token_positions(frame[TOKEN], key, path.name)
    tau = _tau_column(frame, position, path.name) if "tau_hat" in frame.columns else None
    treat = _treat_column(frame, position, path.name) if "treat" in frame.columns else None
    toml_path = path.with_suffix(".toml")
    name, ate = _read_submission_toml(toml_path, key) if toml_path.is_file() else (path.stem, None)
    return Submission(name, path, tau, treat, ate)


def _read_submission_csv(path: Path) -> pd.DataFrame:
    try:
        frame = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8-sig")
    except (ValueError, OSError, UnicodeDecodeError) as exc:
        raise SiteproofError(f"cannot read submission {path.name} as a UTF-8 CSV ({' '.join(str(exc).split())})",
                             "save it as CSV (comma-separated, UTF-8) like the template") from None
    frame.columns = [str(c).strip() for c in frame.columns]
    return frame.apply(lambda col: col.str.strip())


def _token_positions(tokens: pd.Series, key: BenchmarkKey, name: str) -> np.ndarray:
    """For each key token (in key order), its row in the submission; refuses any token problem."""
    known = pd.Index(key.tokens)
    unknown = tokens[~tokens.isin(known)]
    if len(unknown) >= _FOREIGN_SHARE * max(len(tokens), 1):
        raise SiteproofError(
            f"submission {name} was made for another public file ({len(unknown)} of its {len(tokens)} tokens do not "
            f"belong to benchmark {key.benchmark_id})",
            "make the predictions for the data.csv of this benchmark",
        )
    if len(unknown):
        raise SiteproofError(f"submission {name} has {len(unknown)} tokens not in the benchmark, e.g. {_few(unknown)}",
                             "keep the tokens exactly as in the template")
    repeated = tokens[tokens.duplicated()]
    if len(repeated):
        raise SiteproofError(
            f"submission {name} lists {repeated.nunique()} tokens more than once, e.g. {_few(repeated)}",
            "give every token exactly once",
        )
    absent = known.difference(pd.Index(tokens), sort=False)
    if len(absent):
        raise SiteproofError(f"submission {name} misses {len(absent)} of the {len(known)} tokens, e.g. {_few(absent)}",
                             "give a row for every token of the template")
    return pd.Series(np.arange(len(tokens)), index=tokens.to_numpy()).reindex(known).to_numpy()


def _few(values: Iterable[Any], k: int = 3) -> str:
    items = list(dict.fromkeys(str(v) for v in values))
    return ", ".join(repr(v) for v in items[:k]) + (" …" if len(items) > k else "")


def _tau_column(frame: pd.DataFrame, position: np.ndarray, name: str) -> np.ndarray:
    values = pd.to_numeric(frame["tau_hat"], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(values)
    if bad.any():
        raise SiteproofError(f"submission {name}: tau_hat is empty or not a finite number in {int(bad.sum())} rows "
                             f"(first for token {frame[TOKEN].iloc[int(np.argmax(bad))]!r})",
                             "give a finite number for every token")
    return values[position]


def _treat_column(frame: pd.DataFrame, position: np.ndarray, name: str) -> np.ndarray:
    values = pd.to_numeric(frame["treat"], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isin(values, (0.0, 1.0))
    if bad.any():
        raise SiteproofError(f"submission {name}: treat is not 0 or 1 in {int(bad.sum())} rows "
                             f"(first for token {frame[TOKEN].iloc[int(np.argmax(bad))]!r})",
                             "write 1 to treat the unit and 0 not to")
    return values[position].astype(np.int8)


def _read_submission_toml(path: Path, key: BenchmarkKey) -> tuple[str, SubmittedATE | None]:
    """(display name, submitted ATE) from ``name``, ``benchmark`` and ``[ate] estimate, se, ci``."""
    try:
        raw = tomllib.loads(path.read_bytes().decode("utf-8-sig"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise SiteproofError(f"{path.name} is not valid UTF-8 TOML ({exc})", "fix the line it names") from None
    unknown = sorted(set(raw) - {"name", "benchmark", "ate"})
    if unknown:
        raise SiteproofError(f"{path.name} has unknown keys {', '.join(unknown)}", "use name, benchmark and [ate]")
    if "benchmark" in raw and str(raw["benchmark"]) != key.benchmark_id:
        raise SiteproofError(f"{path.name} was made for benchmark {raw['benchmark']!r}, not {key.benchmark_id!r}",
                             "make the submission for this benchmark's data.csv")
    name = str(raw.get("name") or path.stem).strip() or path.stem
    return name, _submitted_ate(raw["ate"], path.name) if "ate" in raw else None


def _submitted_ate(table: Any, where: str) -> SubmittedATE:
    """``[ate]``: estimate and se, or estimate and ci (then se = (high − low)/(2·1.96)); both may be given."""
    fix = "write [ate] with estimate = <number> and se = <number > 0> (and optionally ci = [low, high])"
    if not isinstance(table, dict) or "estimate" not in table or not ({"se", "ci"} & set(table)):
        raise SiteproofError(f"{where}: [ate] needs an estimate and an se (or a ci)", fix)
    unknown = sorted(set(table) - {"estimate", "se", "ci"})
    if unknown:
        raise SiteproofError(f"{where}: [ate] has unknown keys {', '.join(unknown)}", fix)
    est = _finite_number(table["estimate"], f"{where}: ate.estimate", fix)
    ci = _ci_pair(table["ci"], est, where, fix) if "ci" in table else None
    se = _finite_number(table["se"], f"{where}: ate.se", fix) if "se" in table else (ci[1] - ci[0]) / (2 * Z95)
    if se <= 0:
        raise SiteproofError(f"{where}: ate.se is {se}, not positive", fix)
    return SubmittedATE(est, se, ci if ci is not None else normal_ci(est, se))


def _ci_pair(value: Any, est: float, where: str, fix: str) -> tuple[float, float]:
    if not isinstance(value, list) or len(value) != 2:
        raise SiteproofError(f"{where}: ate.ci is not a pair [low, high]", fix)
    low, high = (_finite_number(v, f"{where}: ate.ci", fix) for v in value)
    if not low <= est <= high:
        raise SiteproofError(f"{where}: ate.ci [{low}, {high}] does not contain the estimate {est}", fix)
    return low, high


def _finite_number(value: Any, what: str, fix: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise SiteproofError(f"{what} is {value!r}, not a finite number", fix)
    return float(value)


# ═════════════════════════════════════ grading ═════════════════════════════════════


@dataclass(frozen=True, eq=False)
class _Grader:
    """Design-based ingredients shared by every submission: graded units, scores, half-samples, design ATE."""

    graded: np.ndarray
    y: np.ndarray
    w: np.ndarray
    e: np.ndarray
    mu0: np.ndarray
    gamma0: np.ndarray
    gamma1: np.ndarray
    cost: np.ndarray | None
    site: np.ndarray
    halves: np.ndarray
    design: Estimate
    design_replicates: np.ndarray
    n_boot: int
    seed: int

    @classmethod
    def from_key(cls, key: BenchmarkKey, n_boot: int, seed: int) -> "_Grader":
        """Scores of the graded units; the design ATE and its half-sample replicates over all benchmark units."""
        u, g = key.units, key.graded
        y, w, e, mu0, mu1 = (u[c].to_numpy(dtype=float) for c in ("y", "w", "rate", "mu0", "mu1"))
        gamma0, gamma1 = arm_scores(y, w, e, mu0, mu1)
        site = u["site"].to_numpy(dtype=object)
        design = design_ate(y, w, site, _stratum(u)).estimate
        design_replicates = _half_means(_halves(y.size, n_boot, seed + 1), np.asarray(design.scores))
        cost = u["cost"].to_numpy(dtype=float)[g] if u["cost"].notna().all() else None
        return cls(graded=g, y=y[g], w=w[g], e=e[g], mu0=mu0[g], gamma0=gamma0[g], gamma1=gamma1[g], cost=cost,
                   site=site[g], halves=_halves(int(g.sum()), n_boot, seed), design=design,
                   design_replicates=design_replicates, n_boot=n_boot, seed=seed)

    @property
    def gamma(self) -> np.ndarray:
        return self.gamma1 - self.gamma0


def _stratum(units: pd.DataFrame) -> np.ndarray | None:
    return units["stratum"].to_numpy(dtype=object) if units["stratum"].notna().any() else None


def _halves(n: int, n_boot: int, seed: int) -> np.ndarray:
    """(n_boot, n//2) unit indices of the half-samples: the draws of ``evaluation.half_samples``."""
    return np.concatenate(list(half_samples(n, n_boot, seed)), axis=0)


def _half_means(halves: np.ndarray, scores: np.ndarray) -> np.ndarray:
    """Replicate of a mean of per-unit scores on each half-sample."""
    return scores[halves].mean(axis=1)


@dataclass(frozen=True, eq=False)
class GradedSubmission:
    """One leaderboard row: the metrics (each an :class:`Estimate`), rank and standing in words."""

    name: str
    file: str
    metrics: dict[str, Estimate]
    treated_share: float | None
    submitted_ate: SubmittedATE | None
    ci_covers: bool | None
    rank: int | None = None
    tied_with: str | None = None
    standing: str = ""
    site_means: dict[str, float] | None = None
    replicates: dict[str, np.ndarray] = field(default_factory=dict, repr=False)

    def value(self, metric: str) -> float:
        est = self.metrics.get(metric)
        return float("nan") if est is None else float(est.estimate)

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "submission": self.name, "file": self.file, "rank": self.rank, "tied_with": self.tied_with,
            "standing": self.standing, "metrics": {k: v.to_dict() for k, v in self.metrics.items()},
            "treated_share": self.treated_share, "ci_covers_design_ate": self.ci_covers,
            "submitted_ate": self.submitted_ate.to_dict() if self.submitted_ate else None,
        }
        if self.site_means is not None:
            out["tau_hat_mean_by_site"] = dict(self.site_means)
        return out


@dataclass(frozen=True, eq=False)
class Leaderboard:
    """Every graded submission in rank order, with what the ranking and the ties mean."""

    entries: list[GradedSubmission]
    rank_by: str
    benchmark: dict[str, Any]
    design_ate: Estimate
    n_graded: int
    n_boot: int
    seed: int
    public_check: str
    reveal: bool
    sites: pd.DataFrame | None = None

    def to_frame(self) -> pd.DataFrame:
        """leaderboard.csv: one row per submission, metrics with SEs; no site information."""
        rows = []
        for entry in self.entries:
            row: dict[str, Any] = {"submission": entry.name, "rank": entry.rank, "tied_with": entry.tied_with or ""}
            for key in METRICS:
                est = entry.metrics.get(key)
                row[key] = est.estimate if est else np.nan
                row[f"{key}_se"] = est.se if est else np.nan
            row["treated_share"] = entry.treated_share
            row["ate"] = entry.submitted_ate.estimate if entry.submitted_ate else np.nan
            row["ate_se"] = entry.submitted_ate.se if entry.submitted_ate else np.nan
            row["ate_ci_covers"] = "" if entry.ci_covers is None else ("yes" if entry.ci_covers else "no")
            row["standing"] = entry.standing
            row["file"] = entry.file
            rows.append(row)
        frame = pd.DataFrame(rows)
        frame["rank"] = frame["rank"].astype("Int64")
        return frame

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "schema": LEADERBOARD_SCHEMA, "version": FORMAT_VERSION, "siteproof_version": __version__,
            "benchmark": dict(self.benchmark), "public_check": self.public_check,
            "settings": {"rank_by": self.rank_by, "n_boot": self.n_boot, "seed": self.seed, "reveal": self.reveal,
                         "tie_rule": TIE_RULE},
            "n_graded": self.n_graded, "design_ate": self.design_ate.to_dict(),
            "submissions": [e.to_dict() for e in self.entries],
        }
        if self.reveal and self.sites is not None:
            out["sites"] = _plain_records(self.sites)
        return out


def grade_submissions(
    key_dir: Path | str,
    submissions: Sequence[Path | str],
    *,
    rank_by: str = "autoc",
    reveal: bool = False,
    n_boot: int = 200,
    seed: int | None = None,
    public_data: Path | str | None = None,
) -> Leaderboard:
    """Grade submission CSVs (files or folders) against a sealed key → :class:`Leaderboard` (rank order).

    The public data file (``public_data``, default ``key/../public/data.csv``) is checked against the sealed
    SHA-256 when present. ``seed`` (default: the key's) fixes the half-samples, so grading is reproducible and
    every submission is scored on the same draws. ``reveal`` adds per-site details (site labels, design
    estimates by site, mean τ̂ by site); without it no output names a site.
    """
    if rank_by not in METRICS:
        raise SiteproofError(f"unknown ranking metric {rank_by!r}", f"use one of {', '.join(METRICS)}")
    if int(n_boot) < 2:
        raise SiteproofError(f"n_boot is {n_boot}", "use at least 2 half-samples (default 200)")
    key = read_key(key_dir)
    check = _public_check(key, public_data)
    seed = int(key.meta["seed"] if seed is None else seed)
    files = submission_files(submissions)
    subs = [read_submission(path, key) for path in files]
    _check_unique_names(subs)
    grader = _Grader.from_key(key, int(n_boot), seed)
    graded = [_grade(sub, grader, reveal, rank_by) for sub in subs]
    entries = rank_entries(graded, rank_by)
    benchmark = {"name": key.meta["name"], "benchmark_id": key.benchmark_id, "n": key.meta["n"],
                 "n_graded": int(key.graded.sum()), "holdout_share": key.meta["holdout_share"]}
    sites = _site_details(key) if reveal else None
    return Leaderboard(entries, rank_by, benchmark, grader.design, int(key.graded.sum()), int(n_boot), seed,
                       check, reveal, sites)


def _check_unique_names(subs: list[Submission]) -> None:
    seen: dict[str, Path] = {}
    for sub in subs:
        if sub.name in seen:
            raise SiteproofError(f"two submissions are called {sub.name!r} ({seen[sub.name].name}, {sub.path.name})",
                                 "give each a distinct file name or name = \"...\" in its TOML")
        seen[sub.name] = sub.path


def _grade(sub: Submission, grader: _Grader, reveal: bool, rank_by: str) -> GradedSubmission:
    """Every metric the submission allows, with half-sample replicates for the tie comparisons."""
    metrics: dict[str, Estimate] = {}
    replicates: dict[str, np.ndarray] = {}
    tau = None if sub.tau_hat is None else sub.tau_hat[grader.graded]
    if tau is not None:
        _tau_metrics(tau, grader, rank_by == "blp_beta2", metrics, replicates)
    treated_share = None
    if sub.treat is not None:
        value = rule_value(sub.treat[grader.graded], grader.gamma0, grader.gamma1, grader.cost)
        metrics["rule_gain"] = replace(value.gain, name="rule_gain")
        replicates["rule_gain"] = _half_means(grader.halves, np.asarray(value.gain.scores))
        treated_share = value.treated_share
    covers = None
    if sub.ate is not None:
        d = grader.design
        metrics["ate_error"] = Estimate.from_value("ate_error", sub.ate.estimate - d.estimate, d.se,
                                                   estimand="submitted ATE − design ATE")
        replicates["ate_error"] = sub.ate.estimate - grader.design_replicates
        covers = bool(sub.ate.ci[0] <= d.estimate <= sub.ate.ci[1])
    site_means = None
    if reveal and tau is not None:
        site_means = {str(k): float(v) for k, v in pd.Series(tau).groupby(grader.site).mean().items()}
    return GradedSubmission(sub.name, sub.path.name, metrics, treated_share, sub.ate, covers,
                            site_means=site_means, replicates=replicates)


def _tau_metrics(
    tau: np.ndarray, grader: _Grader, beta2_replicates: bool,
    metrics: dict[str, Estimate], replicates: dict[str, np.ndarray],
) -> None:
    """AUTOC, Qini (replicates from ``rank_metric``) and BLP β₂ of τ̂ on the graded units, added in place.

    BLP β₂ replicates need one regression per half-sample, so they are computed only when β₂ ranks.
    """
    for kind in ("autoc", "qini"):
        result = rank_metric(tau, grader.gamma, kind=kind, n_boot=grader.n_boot, seed=grader.seed)
        metrics[kind] = replace(result.estimate_of(0), name=kind)
        replicates[kind] = result.boot[:, 0]
    metrics["blp_beta2"], replicates["blp_beta2"] = _blp_beta2(tau, grader, beta2_replicates)


def _blp_beta2(tau: np.ndarray, grader: _Grader, with_replicates: bool) -> tuple[Estimate, np.ndarray]:
    """BLP β₂ with known rates and μ̂₀ as baseline; replicates on the shared half-samples.

    β₂ is undefined (NaN) for a τ̂ without variation, and where the regression is singular.
    """
    full = _beta2(grader.y, grader.w, grader.e, tau, grader.mu0)
    reps = np.full(grader.halves.shape[0], np.nan)
    if with_replicates and np.isfinite(full.estimate):
        for b, half in enumerate(grader.halves):
            reps[b] = _beta2(grader.y[half], grader.w[half], grader.e[half], tau[half], grader.mu0[half]).estimate
    return full, reps


def _beta2(y: np.ndarray, w: np.ndarray, e: np.ndarray, tau: np.ndarray, baseline: np.ndarray) -> Estimate:
    undefined = Estimate.from_value("blp_beta2", math.nan, math.nan, estimand="BLP")
    if np.ptp(tau) == 0:
        return undefined
    try:
        return replace(blp(y, w, e, tau, baseline).beta2, name="blp_beta2")
    except SiteproofError:
        return undefined


# ─────────────────────────── ranking and ties ───────────────────────────


def _ranking_value(entry: GradedSubmission, metric: str) -> float:
    """Larger is better: the metric itself, or −|ATE error|."""
    v = entry.value(metric)
    return v if METRICS[metric].higher_is_better else -abs(v)


def _ranking_replicates(entry: GradedSubmission, metric: str) -> np.ndarray:
    reps = entry.replicates[metric]
    return reps if METRICS[metric].higher_is_better else -np.abs(reps)


def paired_difference(a: GradedSubmission, b: GradedSubmission, metric: str) -> tuple[float, float]:
    """(difference a − b in the ranking value of ``metric``, its SE from the shared half-sample replicates)."""
    diff = _ranking_value(a, metric) - _ranking_value(b, metric)
    d = _ranking_replicates(a, metric) - _ranking_replicates(b, metric)
    d = d[np.isfinite(d)]
    return diff, float(d.std(ddof=1)) if d.size > 1 else float("nan")


def rank_entries(entries: Sequence[GradedSubmission], metric: str) -> list[GradedSubmission]:
    """Order by the ranking value (best first; name breaks exact ties), group ties, write standings in words.

    Entries without the metric come last, unranked, with the reason.
    """
    label = METRICS[metric].label
    ranked = [e for e in entries if np.isfinite(_ranking_value(e, metric))]
    unranked = [e for e in entries if not np.isfinite(_ranking_value(e, metric))]
    ranked.sort(key=lambda e: (-_ranking_value(e, metric), e.name))
    out: list[GradedSubmission] = []
    leader: GradedSubmission | None = None
    leader_rank = 0
    for position, entry in enumerate(ranked, start=1):
        if leader is None:
            leader, leader_rank = entry, position
            out.append(replace(entry, rank=position, standing=f"best by {label}"))
            continue
        diff, se = paired_difference(leader, entry, metric)
        gap = f"{_fmt(diff)} (SE {_fmt(se)})"
        if np.isfinite(se) and diff <= Z95 * se:
            out.append(replace(entry, rank=leader_rank, tied_with=leader.name,
                               standing=f"tied with {leader.name}: behind by {gap}, within its uncertainty"))
            continue
        out.append(replace(entry, rank=position, standing=f"behind {leader.name} by {gap}"))
        leader, leader_rank = entry, position
    for entry in sorted(unranked, key=lambda e: e.name):
        out.append(replace(entry, standing=f"not ranked: {_missing_reason(entry, metric)}"))
    return out


def _missing_reason(entry: GradedSubmission, metric: str) -> str:
    needs = METRICS[metric].needs
    if metric not in entry.metrics:
        return {"tau_hat": "no tau_hat column", "treat": "no treat column", "ate": "no [ate] in a TOML file"}[needs]
    return f"{METRICS[metric].label} is undefined (e.g. a constant tau_hat)"


def _site_details(key: BenchmarkKey) -> pd.DataFrame:
    """Per-site design table for ``reveal``: sizes, known rate, difference in means with Neyman SE."""
    u = key.units
    table = site_table(u["y"].to_numpy(dtype=float), u["w"].to_numpy(dtype=int), u["site"].to_numpy(dtype=object),
                       known_rate=u["rate"].to_numpy(dtype=float), stratum=_stratum(u))
    rate = u.groupby("site")["rate"].mean()
    table["rate_known"] = table["site"].map(rate)
    return table[["site", "n", "n_treated", "rate_known", "difference_in_means", "se"]]


# ═════════════════════════════════════ rendering ═════════════════════════════════════


def _fmt(x: float | None, digits: int = 3) -> str:
    """Fixed decimals; "–" for a missing value; no "-0.000"."""
    if x is None or not np.isfinite(x):
        return "–"
    text = f"{x:.{digits}f}"
    return text[1:] if text.startswith("-") and float(text) == 0 else text


def _cell(est: Estimate | None) -> str:
    return "–" if est is None or not np.isfinite(est.estimate) else f"{_fmt(est.estimate)} ({_fmt(est.se)})"


def _covers(entry: GradedSubmission) -> str:
    return "–" if entry.ci_covers is None else ("yes" if entry.ci_covers else "no")


def _display_columns(board: Leaderboard) -> list[tuple[str, Callable[[GradedSubmission], str]]]:
    """(header, cell) pairs shared by the terminal table and the HTML page."""
    cols: list[tuple[str, Callable[[GradedSubmission], str]]] = [
        ("rank", lambda e: "" if e.rank is None else str(e.rank)),
        ("submission", lambda e: e.name),
    ]
    for key, info in METRICS.items():
        cols.append((f"{info.label} (SE)", lambda e, k=key: _cell(e.metrics.get(k))))
        if key == "rule_gain":
            cols.append(("treated share", lambda e: _fmt(e.treated_share, 2)))
    cols.append(("CI covers design ATE", _covers))
    cols.append(("standing", lambda e: e.standing))
    return cols


def leaderboard_table(board: Leaderboard) -> Table:
    """The leaderboard as a rich :class:`~rich.table.Table` (not printed); the ranking column is bold."""
    rank_header = f"{METRICS[board.rank_by].label} (SE)"
    table = Table(
        title=f"Leaderboard — {board.benchmark['name']} (ranked by {METRICS[board.rank_by].label})",
        caption=(f"{board.n_graded} graded units · design ATE {_cell(board.design_ate)} · "
                 f"ties: paired difference within 1.96 SE · {board.public_check}"),
        caption_justify="left",
    )
    for header, _ in _display_columns(board):
        text_col = header in ("submission", "standing")
        style = "bold" if header == rank_header else None
        table.add_column(header, justify="left" if text_col else "right", style=style, overflow="fold")
    for entry in board.entries:
        table.add_row(*[cell(entry) for _, cell in _display_columns(board)])
    return table


LEADERBOARD_CSS = """
div.scroll { overflow-x: auto; }
table.board th { white-space: normal; vertical-align: bottom; }
table.board td { white-space: nowrap; border-bottom: none; }
table.board tbody tr { background: none; }
table.board tbody:nth-of-type(even) { background: var(--panel); }
table.board tr.standing td { text-align: left; white-space: normal; color: var(--muted); font-size: 13.5px;
  padding-top: 0; border-bottom: 1px solid var(--rule); }
table.board .ranked { font-weight: 700; }
"""


def leaderboard_html(board: Leaderboard) -> str:
    """The leaderboard page: self-contained HTML (inline CSS, no scripts, no external resources)."""
    e = html.escape
    cols = [(h, cell) for h, cell in _display_columns(board) if h != "standing"]
    info = METRICS[board.rank_by]
    classes = {"submission": "text", f"{info.label} (SE)": "ranked"}
    head = "".join(f'<th class="{classes.get(h, "")}">{e(h)}</th>' for h, _ in cols)
    body = "".join(  # one tbody per submission: its metrics, then its standing in words across the table
        "<tbody><tr>" + "".join(f'<td class="{classes.get(h, "")}">{e(cell(entry))}</td>' for h, cell in cols)
        + f'</tr><tr class="standing"><td colspan="{len(cols)}">{e(entry.standing)}</td></tr></tbody>'
        for entry in board.entries
    )
    metric_items = "".join(f"<li><b>{e(m.label)}</b>: {e(m.meaning)}.</li>" for m in METRICS.values())
    bench = board.benchmark
    check = board.public_check[:1].upper() + board.public_check[1:]
    holdout = (f" (the {board.n_graded} held-out units of {bench['n']})" if bench["holdout_share"] > 0 else "")
    return page_head(f"Leaderboard — {bench['name']}", extra_css=LEADERBOARD_CSS) + f"""
<header class="masthead"><div class="kicker">siteproof holdout benchmark · id {e(bench['benchmark_id'])}</div>
<h1>Leaderboard — {e(bench['name'])}</h1>
<p>{len(board.entries)} submissions graded on {board.n_graded} units{e(holdout)}, ranked by {e(info.label)}
({'larger is better' if info.higher_is_better else 'smaller absolute value is better'}).</p></header>
<section class="part"><h2>Ranking</h2>
<p class="reading">Cells read <b>estimate (standard error)</b>. {e(TIE_RULE[0].upper() + TIE_RULE[1:])}; the
line under each submission says where it stands, in words.</p>
<div class="scroll"><table class="board"><thead><tr>{head}</tr></thead>{body}</table></div>
<p class="note">Design-based pooled ATE: {e(_cell(board.design_ate))}, 95 % CI
[{_fmt(board.design_ate.ci[0])}, {_fmt(board.design_ate.ci[1])}]. {e(check)}.</p>
</section>
<section class="part"><h2>How the metrics are computed</h2>
<p>Every metric uses the sites' randomization: each unit's known assignment probability e and outcome models
fitted without the unit give doubly robust scores that are unbiased for the unit's effect, whatever model the
submission used. Standard errors come from {board.n_boot} half-samples shared by all submissions
(seed {board.seed}).</p>
<ul>{metric_items}</ul>
</section>
{_sites_html(board)}
<p class="footnote">siteproof {e(__version__)} · leaderboard format version {FORMAT_VERSION}</p>
</body></html>
"""


def _sites_html(board: Leaderboard) -> str:
    """Per-site section, only with ``reveal``: design estimate by site and each submission's mean τ̂ there."""
    if not board.reveal or board.sites is None:
        return ""
    e = html.escape
    with_tau = [entry for entry in board.entries if entry.site_means is not None]
    head = "".join(f"<th>{e(h)}</th>" for h in ["site", "n", "treated", "known rate", "DiM (SE)"]
                   + [f"mean τ̂: {entry.name}" for entry in with_tau])
    rows = []
    for row in sorted(board.sites.to_dict("records"), key=lambda r: natural_key(str(r["site"]))):
        cells = [str(row["site"]), str(row["n"]), str(row["n_treated"]), _fmt(row["rate_known"], 2),
                 f"{_fmt(row['difference_in_means'])} ({_fmt(row['se'])})"]
        cells += [_fmt(entry.site_means.get(str(row["site"]))) for entry in with_tau]
        rows.append("<tr>" + "".join(f"<td>{e(c)}</td>" for c in cells) + "</tr>")
    return f"""<section class="part"><h2>Sites (revealed)</h2>
<p class="note">Shown because grading ran with reveal. Difference in means per site with its Neyman SE; mean τ̂
over each site's graded units.</p>
<table><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table></section>"""


def write_leaderboard_html(board: Leaderboard, path: Path | str) -> Path:
    """Write :func:`leaderboard_html` to ``path`` atomically."""
    return atomic_write_text(path, leaderboard_html(board))


def write_leaderboard(board: Leaderboard, out_dir: Path | str, *, force: bool = False) -> list[Path]:
    """Write ``leaderboard.csv``, ``leaderboard.json``, ``leaderboard.html`` (and ``sites.csv`` with reveal).

    All files appear together or not at all; a folder holding an earlier leaderboard needs ``force``.
    """
    out = Path(out_dir)
    earlier = [name for name in LEADERBOARD_FILES if (out / name).exists()]
    if earlier and not force:
        raise SiteproofError(f"output folder {out} already holds a leaderboard ({', '.join(earlier)})",
                             "choose another --out folder or add --force to overwrite it")
    names = ["leaderboard.csv", "leaderboard.json", "leaderboard.html"]
    with StagedOutput(out, force=True) as staged:
        atomic_write_text(staged / names[0], board.to_frame().to_csv(index=False, lineterminator="\n"))
        atomic_write_text(staged / names[1], to_json_text(board.to_dict()))
        write_leaderboard_html(board, staged / names[2])
        if board.reveal and board.sites is not None:
            names.append("sites.csv")
            atomic_write_text(staged / names[3], _sites_frame(board).to_csv(index=False, lineterminator="\n"))
    if "sites.csv" not in names:
        (out / "sites.csv").unlink(missing_ok=True)  # an earlier revealed run's site table must not linger
    return [out / name for name in names]


def _sites_frame(board: Leaderboard) -> pd.DataFrame:
    frame = board.sites.copy() if board.sites is not None else pd.DataFrame()
    for entry in board.entries:
        if entry.site_means is not None:
            frame[f"tau_hat_mean:{entry.name}"] = frame["site"].astype(str).map(entry.site_means)
    return frame
