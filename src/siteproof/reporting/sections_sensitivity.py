"""Report: the omitted-variable-bias sensitivity of the blind AIPW, held against the bias the sites revealed.

The bound B = S·√(r_Y·r_D/(1 − r_D)) (Chernozhukov, Cinelli, Newey, Sharma & Syrgkanis 2022; formulas in
docs/sensitivity.md) is what an analyst could have computed blind; the realized bias D = blind − design is what
unmasking found.  "Warned" means a confounder no stronger than the strongest observed covariate could have
produced the realized bias.
"""

from __future__ import annotations

from typing import Any

from . import figures
from .context import RunView
from .document import FigureBlock, Table, Text
from .formatting import fmt_pct, fmt_sig
from .sets_page import sensitivity_figure

WARNED_WORDS = {True: "yes", False: "no", None: "—"}


def sensitivity_parts(run: RunView) -> list[Any]:
    """A table of the robustness values, the strongest benchmark and the realized bias, and the contour figure;
    a one-line note when the scorecard holds no sensitivity record."""
    record = run.card.get("sensitivity")
    if not record:
        return [Text("Sensitivity analysis: not in this scorecard (no blind AIPW claim).", "absent")]
    realized = (record.get("realized_bias") or {}).get("estimate")
    row = [fmt_pct(record.get("robustness_value"), 1), fmt_pct(record.get("robustness_value_alpha"), 1),
           fmt_pct(record.get("robustness_value_to_design"), 1), str(record.get("strongest") or "—"),
           fmt_sig(record.get("bound_at_strongest")), fmt_sig(None if realized is None else abs(realized)),
           WARNED_WORDS.get(record.get("warned"), "—")]
    table = Table(
        "Would a sensitivity analysis of the blind AIPW have warned? (omitted-variable-bias bounds)",
        ["RV", f"RV (α = {record.get('alpha', 0.05):g})", "RV to reach the design", "strongest covariate",
         f"bound at 1× strongest ({run.unit})", f"|realized bias| ({run.unit})", "warned"],
        [row], text=(3, 6),
        notes=["RV (robustness value; Cinelli & Hazlett 2020): the equal share r_D = r_Y of the Riesz "
               "representer's variance and of the outcome's residual variance that an omitted confounder must "
               "explain to move the estimate to 0 (to its CI bound for the α column). 'RV to reach the design': "
               "the strength that would produce the bias unmasking found. Warned: that bias lies inside the bound "
               "of a confounder as strong as the strongest observed covariate (docs/sensitivity.md)."],
    )
    fig = figures.render(sensitivity_figure(record, run.unit), "sensitivity")
    return [table, FigureBlock(fig, "Bias bound of the blind AIPW over the two partial R²s (contours), the "
                                    "observed covariates as benchmarks (diamonds), the |estimate| contour (solid) "
                                    "and the realized bias |blind − design| (dashed).")]
