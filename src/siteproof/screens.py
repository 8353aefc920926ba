"""Terminal screens for the blind claims: compact rich tables built from ``claims.json`` content.

Presentation only — every number comes from the claims record; nothing is estimated here.
"""

from __future__ import annotations

from typing import Any

from rich.table import Table
from rich.text import Text

MODEL_NAMES = {
    "constant": "constant effect",
    "s": "S-learner",
    "t": "T-learner",
    "x": "X-learner",
    "r": "R-learner",
    "dr": "DR-learner",
}
ESTIMATOR_NAMES = {
    "naive": "difference in means (unadjusted)",
    "regression": "regression adjustment (Lin 2013, HC2)",
    "ipw": "inverse-propensity weighting (Hajek)",
    "aipw": "augmented IPW, cross-fitted",
    "overlap": "overlap-weighted (Li, Morgan & Zaslavsky 2018)",
}


def fmt(value: Any, digits: int = 2) -> str:
    """A number for a table cell: fixed digits, '—' for missing."""
    if value is None:
        return "—"
    return f"{value:.{digits}f}"


def fmt_ci(ci: Any, digits: int = 2) -> str:
    """'[lo, hi]' for a 95 % interval."""
    if not ci or ci[0] is None:
        return "—"
    return f"[{ci[0]:.{digits}f}, {ci[1]:.{digits}f}]"


def _header(record: dict[str, Any]) -> Text:
    data, nuis = record["data"], record["nuisance"]
    picks = ", ".join(f"{name} → {label}" for name, label in nuis["picks"].items())
    excluded = sum(data["excluded"].values())
    lines = [
        f"Blind analysis of {data['n']:,} units ({data['n_treated']:,} treated); site labels hidden. "
        f"Outcome: {data['outcome']}. {len(data['features'])} covariate features.",
        f"Excluded for a missing outcome or treatment: {excluded}. Cross-fitting: {record['settings']['folds']} folds, "
        f"seed {record['settings']['seed']}.",
        f"Learner picked by out-of-fold loss: {picks}. Propensities clipped to {nuis['clip']}: "
        f"{nuis['n_clipped']} units.",
    ]
    return Text("\n".join(lines))


def ate_table(record: dict[str, Any]) -> Table:
    """One row per average-effect estimator: estimate, SE and 95 % CI, in outcome units."""
    unit = record["data"]["outcome"]
    table = Table(title=f"Average effect of treatment on {unit} (blind)", title_justify="left")
    for col in ("estimator", "estimand", "estimate", "SE", "95% CI"):
        table.add_column(col, justify="left" if col in ("estimator", "estimand") else "right")
    for row in record["ate"]:
        table.add_row(
            ESTIMATOR_NAMES.get(row["estimator"], row["estimator"]), row["estimand"],
            fmt(row["estimate"]), fmt(row["se"]), fmt_ci(row["ci"]),
        )
    return table


def cate_table(record: dict[str, Any]) -> Table:
    """One row per effect model: R-loss difference vs constant, BLP β₂, AUTOC and the high − low split."""
    table = Table(title="Heterogeneous effects (out-of-fold τ̂, blind AIPW scores)", title_justify="left",
                  caption="ΔR-loss < 0: the model beats a constant effect (t = Δ/SE). β₂ ≈ 1: τ̂ is well "
                          "calibrated; β₂ > 0 (one-sided p): heterogeneity detected. AUTOC > 0: ranking by τ̂ "
                          "finds units with larger effects. High − low: mean effect above minus below the median "
                          "of τ̂. All in outcome units except β₂ and t; ± is one SE.",
                  caption_justify="left")
    for col in ("model", "ΔR-loss ± SE", "t", "β₂ ± SE", "p(β₂>0)", "AUTOC ± SE", "high − low ± SE"):
        table.add_column(col, justify="left" if col == "model" else "right")
    for row in record["cate"]:
        if row["model"] == "constant":
            continue
        diff = row["r_loss"]["difference"]
        table.add_row(
            MODEL_NAMES.get(row["model"], row["model"]),
            f"{diff['estimate']:.3f} ± {diff['se']:.3f}", fmt(row["r_loss"]["t"], 1),
            f"{row['blp']['beta2']['estimate']:.2f} ± {row['blp']['beta2']['se']:.2f}",
            fmt(row["blp"]["p_beta2_positive"], 3),
            f"{row['autoc']['estimate']:.2f} ± {row['autoc']['se']:.2f}",
            f"{row['gates']['high_low']['estimate']:.2f} ± {row['gates']['high_low']['se']:.2f}",
        )
    return table


def rules_table(record: dict[str, Any], budgets_shown: tuple[str, ...] = ("threshold", "top20", "tree")) -> Table:
    """Selected learned rules: treated share, value and gain over random allocation with the same share."""
    table = Table(title="Learned treatment rules (doubly robust value, blind)", title_justify="left",
                  caption="Value: mean outcome (net of cost when a cost column exists) if the rule were followed. "
                          "Gain: value minus random allocation treating the same share. ± is one SE.",
                  caption_justify="left")
    for col in ("rule", "treated", "value ± SE", "gain ± SE", "gain 95% CI"):
        table.add_column(col, justify="left" if col == "rule" else "right")
    for row in record["rules"]:
        if not row["rule"].endswith(budgets_shown):
            continue
        table.add_row(
            row["rule"], f"{100 * row['treated_share']:.0f}%",
            f"{row['value']['estimate']:.2f} ± {row['value']['se']:.2f}",
            f"{row['gain']['estimate']:.2f} ± {row['gain']['se']:.2f}", fmt_ci(row["gain"]["ci"]),
        )
    return table


def claims_renderables(record: dict[str, Any]) -> list[Any]:
    """Everything the ``blind`` verb prints, top to bottom."""
    items: list[Any] = [_header(record), ate_table(record), cate_table(record), rules_table(record)]
    tree = next((r for r in record["rules"] if r["kind"] == "tree"), None)
    if tree is not None:
        items.append(Text("Depth-2 rule (fit on all units; value above is out-of-fold):\n" + tree["tree_text"]))
    for message in record["warnings"]:
        items.append(Text(f"warning: {message}", style="bold"))
    return items
