"""The blind claims as a typed object, and their files: ``claims.json`` plus the per-unit sidecar ``units.parquet``.

The format is documented in docs/claims-format.md.  Both files are written atomically; reading checks the
schema name and version and the SHA-256 of the locked analysis plan (``plan``).
"""

from __future__ import annotations

import io
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from ..core.errors import SiteproofError
from ..core.outputs import atomic_write_bytes, atomic_write_json
from ..core.results import ResultsMixin
from .effects import CateFit
from .plan import check_plan
from .rules import TreeRule

CLAIMS_FILE = "claims.json"
UNITS_FILE = "units.parquet"
CLAIMS_SCHEMA = "siteproof/claims"
CLAIMS_VERSION = 2  # 2: the locked analysis plan (``plan``) is part of the record
FRAME_COLUMNS = ("claim", "family", "estimate", "se", "ci_low", "ci_high")


def score_column(estimator: str) -> str:
    """The sidecar column holding an ATE estimator's per-unit scores (docs/claims-format.md)."""
    return f"score_{estimator}"


def tau_column(model: str) -> str:
    """The sidecar column holding a CATE model's out-of-fold τ̂."""
    return f"tau_{model}"


def rule_column(rule: str) -> str:
    """The sidecar column holding a rule's 0/1 assignment π(X)."""
    return f"rule_{rule}"


def rule_name(model: str | None, kind: str, budget: float | None = None) -> str:
    """The unique name of a rule: ``<model>.threshold``, ``<model>.top<100·q>`` or ``tree``.

    The budget is written in full (``top12`` for q = 0.12, ``top12.5`` for q = 0.125; ten significant digits),
    so distinct budgets always give distinct names.
    """
    if kind == "tree":
        return "tree"
    if kind == "threshold":
        return f"{model}.threshold"
    if kind == "budget" and budget is not None:
        return f"{model}.top{format(100 * budget, '.10g')}"
    raise ValueError(f"unknown rule kind {kind!r}")


def _row(claim: str, family: str, figure: dict[str, Any] | None) -> dict[str, Any]:
    """One tidy row from an {estimate, se, ci} record (missing figures become NaN)."""
    figure = figure or {}
    ci = figure.get("ci") or [float("nan"), float("nan")]
    return {"claim": claim, "family": family, "estimate": figure.get("estimate", float("nan")),
            "se": figure.get("se", float("nan")), "ci_low": ci[0], "ci_high": ci[1]}


def _cate_rows(model: dict[str, Any]) -> list[dict[str, Any]]:
    """The rows of one CATE model: R-loss difference from the constant model, GATES, high−low (halves),
    top−bottom (extreme groups), BLP β₁/β₂, AUTOC, Qini — labelled as in the scorecard frame."""
    key = f"CATE {model['model']}"
    rows = [_row(f"{key} R-loss", "R-loss", model["r_loss"].get("difference"))]
    if "gates" in model:
        rows += [_row(f"{key} GATE {g['group'] + 1}", "GATES", g) for g in model["gates"]["groups"]]
        rows.append(_row(f"{key} high−low", "CATE", model["gates"].get("high_low")))
        rows.append(_row(f"{key} top−bottom", "GATES", model["gates"].get("high_minus_low")))
    if "blp" in model:
        rows += [_row(f"{key} BLP {label}", "BLP", model["blp"].get(b)) for b, label in (("beta1", "β₁"), ("beta2", "β₂"))]
    rows += [_row(f"{key} {kind}", "rank", model[kind]) for kind in ("autoc", "qini") if kind in model]
    return rows


def _check_schema(record: dict[str, Any], where: str) -> None:
    """Refuse a record that is not a claims file of the version this code reads."""
    if not isinstance(record, dict) or record.get("schema") != CLAIMS_SCHEMA:
        raise SiteproofError(f"{where} is not a siteproof claims file", "point at the folder `siteproof blind` wrote")
    if record.get("version") != CLAIMS_VERSION:
        raise SiteproofError(
            f"{where} has claims format version {record.get('version')!r}; this siteproof reads version {CLAIMS_VERSION}",
            "rerun `siteproof blind` with this version of siteproof",
        )
    check_plan(record, where)


@dataclass(repr=False)
class Claims(ResultsMixin):
    """Everything the blind analysis asserts, plus the fitted objects needed to transport it to new units.

    ``record`` is the content of ``claims.json``; ``units`` is the per-unit sidecar.  The fitted models are
    present only on the object :func:`~siteproof.blind.analysis.run_blind` returned, not on one read from disk.
    """

    record: dict[str, Any]
    units: pd.DataFrame
    cate_fits: dict[str, CateFit] = field(default_factory=dict)
    tree: TreeRule | None = None

    def to_dict(self) -> dict[str, Any]:
        """The content of ``claims.json``."""
        return self.record

    @classmethod
    def from_dict(cls, record: dict[str, Any], units: pd.DataFrame) -> "Claims":
        """Claims from a ``claims.json`` record and its sidecar; checks schema, version and the unit count."""
        _check_schema(record, "the claims record")
        n = record.get("data", {}).get("n")
        if len(units) != n:
            raise SiteproofError(
                f"{UNITS_FILE} has {len(units)} rows but the claims describe {n} units",
                "rerun `siteproof blind`; the two files must come from the same run",
            )
        return cls(record=record, units=units)

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Claims) and self.record == other.record and self.units.equals(other.units)

    def _key_numbers(self) -> dict[str, Any]:
        aipw = next((a for a in self.record.get("ate", []) if a["estimator"] == "aipw"), {})
        return {
            "n": self.record.get("data", {}).get("n"), "aipw": aipw.get("estimate"), "se": aipw.get("se"),
            "models": len(self.record.get("cate", [])), "rules": len(self.record.get("rules", [])),
        }

    def to_frame(self) -> pd.DataFrame:
        """One row per claim (ATE estimators, CATE model metrics, rule values and gains):
        claim, family, estimate, se, ci_low, ci_high."""
        rows = [_row(f"ATE {a['estimator']}", "ATE", a) for a in self.record.get("ate", [])]
        for model in self.record.get("cate", []):
            rows += _cate_rows(model)
        for rule in self.record.get("rules", []):
            rows += [_row(f"rule {rule['rule']} {part}", "rule", rule.get(part)) for part in ("value", "gain")]
        return pd.DataFrame(rows, columns=list(FRAME_COLUMNS))


def write_claims(claims: Claims, out_dir: Path | str) -> Path:
    """Write ``claims.json`` and ``units.parquet`` (zstd) into ``out_dir``; returns the claims path."""
    out = Path(out_dir)
    buffer = io.BytesIO()
    claims.units.to_parquet(buffer, compression="zstd", index=False)
    atomic_write_bytes(out / UNITS_FILE, buffer.getvalue())
    return atomic_write_json(out / CLAIMS_FILE, claims.to_dict())


def read_claims(path: Path | str) -> Claims:
    """Read claims from a folder (or a ``claims.json`` path); the schema name and version are checked."""
    path = Path(path)
    folder = path if path.is_dir() else path.parent
    claims_path = folder / CLAIMS_FILE
    units_path = folder / UNITS_FILE
    if not claims_path.exists() or not units_path.exists():
        raise SiteproofError(
            f"no blind claims found in {folder} (need {CLAIMS_FILE} and {UNITS_FILE})",
            "run `siteproof blind` first, or point at the folder it wrote",
        )
    try:
        record = json.loads(claims_path.read_text(encoding="utf-8"))
        units = pd.read_parquet(units_path)
    except (OSError, ValueError) as exc:
        raise SiteproofError(f"cannot read the claims in {folder}: {exc}", "rerun `siteproof blind`") from exc
    _check_schema(record, str(claims_path))
    _check_sections(record, str(claims_path))
    return Claims.from_dict(record, units)


def _check_sections(record: dict[str, Any], where: str) -> None:
    """Refuse a damaged claims file: ``data`` must be an object, ``ate``/``cate``/``rules`` lists of objects,
    and every ATE claim must name its estimator and give numbers (or null) for its estimate and SE."""
    def damaged(what: str) -> SiteproofError:
        return SiteproofError(f"{where} is damaged: {what}", "rerun `siteproof blind` to write it again")

    if not isinstance(record.get("data"), dict):
        raise damaged("'data' is not an object")
    for section in ("ate", "cate", "rules"):
        items = record.get(section, [])
        if not isinstance(items, list) or not all(isinstance(item, dict) for item in items):
            raise damaged(f"'{section}' is not a list of claims")
    for claim in record.get("ate", []):
        if not isinstance(claim.get("estimator"), str):
            raise damaged("an ATE claim has no estimator name")
        for key in ("estimate", "se"):
            value = claim.get(key)
            if value is not None and (isinstance(value, bool) or not isinstance(value, (int, float))):
                raise damaged(f"the {key} of ATE claim '{claim['estimator']}' is {value!r}, not a number")
