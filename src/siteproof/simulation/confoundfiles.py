"""Writing a confounded subsample as a ready-to-run study folder: data.csv, study.toml and truth.json.

``study.toml`` names ``data.csv``, the column roles, the cell column as the site, and every cell's known
assignment rate e_c under ``[rates]`` (read by :func:`siteproof.intake.spec.load_spec_toml`), so
``siteproof run --study DIR/study.toml`` (or ``seal``) runs on it unchanged.  The covariates are listed under
``keep_columns`` too: the cells are functions of them, so they resemble the site by construction and the
blind analysis must still see them (they carry the confounding that unconfoundedness adjusts for).
``truth.json`` holds :meth:`~siteproof.simulation.confound.ConfoundedSample.truth_record`.  The folder is
written through a staged copy (:class:`~siteproof.core.outputs.StagedOutput`): all three files or none.
"""

from __future__ import annotations

import json
from pathlib import Path

from .. import __version__
from ..core.errors import SiteproofError
from ..core.outputs import StagedOutput, atomic_write_text, to_json_text
from .confound import ConfoundedSample

SCHEMA = "siteproof/confound-truth"
VERSION = 1
FILES = ("data.csv", "study.toml", "truth.json")


def _toml_text(value: str) -> str:
    """A TOML basic string (JSON string escapes are valid TOML)."""
    return json.dumps(value, ensure_ascii=False)


def study_toml(sample: ConfoundedSample, name: str) -> str:
    """The study file of the sample: data, roles, the cell column as site, its seed and the known rates."""
    trial = sample.plan.trial
    covariates = [c for c in sample.data.columns if c in set(trial.covariates)]
    names = "[" + ", ".join(_toml_text(c) for c in covariates) + "]"
    lines = [
        "# A confounded subsample of a randomized trial (siteproof confound); each cell is a site whose",
        "# assignment rate is known: e_c = p·k1(c) / (p·k1(c) + (1 − p)·k0(c)).  Truths: truth.json.",
        f"name = {_toml_text(name)}",
        'data = "data.csv"',
        f"outcome = {_toml_text(trial.outcome)}",
        f"treatment = {_toml_text(trial.treatment)}",
        f"treated_value = {_toml_text(trial.treated_value)}",
        f"site = {_toml_text(sample.site_column)}",
        f"covariates = {names}",
        f"keep_columns = {names}",
        f"seed = {int(sample.seed)}",
        "",
        "[rates]",
    ]
    lines += [f"{_toml_text(cell)} = {float(rate)!r}" for cell, rate in sample.rates.items()]
    return "\n".join(lines) + "\n"


def write_confounded(sample: ConfoundedSample, out_dir: Path | str, *, force: bool = False,
                     name: str | None = None) -> dict[str, Path]:
    """Write ``out_dir/data.csv``, ``study.toml`` and ``truth.json`` (module docstring); returns their paths.

    A folder that already holds any of these files is refused unless ``force``.
    """
    out = Path(out_dir)
    earlier = [f for f in FILES if (out / f).exists()]
    if earlier and not force:
        raise SiteproofError(f"output folder {out} already holds a confounded sample ({', '.join(earlier)})",
                             "choose another --out folder or add --force to overwrite it")
    source = sample.plan.trial.source
    name = name or f"confounded {Path(source).stem if not source.startswith('<') else 'trial'}"
    record = {"schema": SCHEMA, "version": VERSION, "siteproof_version": __version__, **sample.truth_record()}
    with StagedOutput(out, force=True) as staged:
        atomic_write_text(staged / "data.csv", sample.data.to_csv(index=False, lineterminator="\n"))
        atomic_write_text(staged / "study.toml", study_toml(sample, name))
        atomic_write_text(staged / "truth.json", to_json_text(record))
    return {f.split(".")[0]: out / f for f in FILES}
