"""What the students get besides the data: the task sheet (Markdown) and the submission templates."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from .layout import PART, PUBLIC_DATA, TEMPLATE_CSV, TEMPLATE_TOML, TOKEN


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
    if holdout:
        honesty = (
            f"Only the {meta['n_graded']} `test` units are graded. Their covariates are in the file but their "
            "outcome and treatment are not: fit your models on the `train` units and predict `tau_hat` and "
            "`treat` for every unit from its covariates (you may also use the `test` units' covariates, e.g. "
            "to study who they are). Predictions for the `train` units are accepted but not graded."
        )
    else:
        honesty = (
            "Every unit is graded in-sample: its outcome is in the file. A prediction for a unit must not use "
            "that unit's own outcome or treatment: fit your models on the other units (cross-fitting: split the "
            "units into folds and predict each fold from models trained on the others). In-sample predictions "
            "are graded as if they were honest and will look better than they are."
        )
    graded_units = f"the {meta['n_graded']} `test` units" if holdout else f"all {meta['n']} units"
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

1. **`<your name>.csv`**, one row per token — all {meta['n']} tokens, each exactly once — with exactly the
   columns (any other column is refused)
   * `{TOKEN}`;
   * `tau_hat`: your prediction of the unit's treatment effect (outcome if treated minus outcome if not
     treated, in outcome units), a finite number;
   * `treat`: 1 if you would treat the unit, 0 if not (your treatment rule).

   You may leave out `tau_hat` or `treat`; the metrics that need it are then not graded.
   `{TEMPLATE_CSV}` lists every token.
2. Optionally **`<your name>.toml`** beside it, with your estimate of the average treatment effect over
   {graded_units} (`{TEMPLATE_TOML}` is a template):

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
* **ATE error**: your average effect minus the design-based estimate over the graded units, and whether your
  95 % interval covers it (your teacher may keep these values to themselves).

Every metric is reported with its standard error. The leaderboard ranks by AUTOC unless your teacher announces
another metric. Two submissions whose difference is within its uncertainty (95 %, paired over the same units)
share a rank and are marked as tied.
"""


def template_csv(tokens: np.ndarray) -> str:
    """submission_template.csv: every token, with empty tau_hat and treat columns."""
    frame = pd.DataFrame({TOKEN: tokens, "tau_hat": "", "treat": ""})
    return frame.to_csv(index=False, lineterminator="\n")


def template_toml(meta: dict[str, Any]) -> str:
    """submission_template.toml: name, benchmark id and an [ate] table to fill in."""
    return (f'name = "your name"\nbenchmark = "{meta["benchmark_id"]}"\n\n[ate]\n'
            "estimate = 0.0\nse = 0.0\n# ci = [0.0, 0.0]\n")
