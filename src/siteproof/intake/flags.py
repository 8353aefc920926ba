"""Command-line data flags → :class:`~siteproof.intake.study.StudySpec`, with cheap path checks first.

The flags shared by ``run``, ``blind``, ``unmask`` and ``seal`` (``DATA --outcome --treatment --site ...``,
or ``--study FILE.toml`` whose keys the flags override) are packed into :class:`DataFlags`.
:func:`check_paths` refuses a missing data or study file and an output folder that cannot exist or cannot be
written using the file system only, so these mistakes are reported before the analysis libraries are
imported; :func:`spec_from_flags` then builds the study specification and checks its seed and margin.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Optional

from ..core.errors import SiteproofError

if TYPE_CHECKING:
    from .study import StudySpec

REQUIRED = (("data", "DATA"), ("outcome", "--outcome"), ("treatment", "--treatment"), ("site", "--site"))
#: seeds must lie in [0, 2³²): the range numpy's legacy generators and scikit-learn's random_state accept
SEED_BOUND = 2**32


def check_seed(seed: Any, flag: str = "--seed") -> int:
    """Refuse a seed that is not a whole number in 0 ≤ seed < 2³²; return it as an int."""
    numpy_integer = type(seed).__module__ == "numpy" and type(seed).__name__.startswith(("int", "uint"))
    whole = (isinstance(seed, int) and not isinstance(seed, bool)) or numpy_integer
    if not whole or not 0 <= int(seed) < SEED_BOUND:
        raise SiteproofError(f"the seed {seed!r} is not a whole number in 0 … {SEED_BOUND - 1}",
                             f"give {flag} a whole number ≥ 0 and < 2³², e.g. 2026")
    return int(seed)


@dataclass
class DataFlags:
    """The data flags as given on the command line; ``None`` means the flag was not given."""

    data: Optional[Path] = None
    study: Optional[Path] = None
    outcome: Optional[str] = None
    treatment: Optional[str] = None
    site: Optional[str] = None
    treated_value: Optional[str] = None
    covariates: Optional[str] = None
    id: Optional[str] = None
    cost: Optional[str] = None
    stratum: Optional[str] = None
    cluster: Optional[str] = None
    rates: Optional[str] = None
    margin: Optional[float] = None
    seed: Optional[int] = None
    encoding: Optional[str] = None
    keep_column: Optional[list[str]] = None
    drop_column: Optional[list[str]] = None
    site_derived: Optional[list[str]] = None


def split_list(text: Optional[str]) -> Optional[list[str]]:
    """``"a, b,,c"`` → ``["a", "b", "c"]``; ``None`` or an empty string → ``None``."""
    return [part.strip() for part in text.split(",") if part.strip()] if text else None


def check_paths(flags: DataFlags, out: Optional[Path] = None) -> None:
    """Refuse a missing data or study file and an ``--out`` that is, or lies under, a file.

    Only :mod:`pathlib` is used, so the check is instant; a data path inside a study file is checked later,
    when the study file is read.
    """
    if flags.study is not None:
        _check_file(Path(flags.study), "study file", "check the path given to --study")
    if flags.data is not None:
        _check_file(
            Path(flags.data), "data file",
            "check the path (a relative path in a study file is read from the study file's folder)",
        )
    if out is not None:
        _check_out(Path(out))


def _check_file(path: Path, label: str, fix: str) -> None:
    """The path names an existing file, not a folder."""
    if not path.exists():
        raise SiteproofError(f"{label} {path} not found", fix)
    if path.is_dir():
        raise SiteproofError(f"{label.replace(' file', ' path')} {path} is a folder, not a file", f"name the {label} itself")


def _check_out(out: Path) -> None:
    """The output folder exists as a folder or can be created, and can be written."""
    from ..core.outputs import check_out_path

    check_out_path(out, "folder")


def spec_from_flags(flags: DataFlags, out: Optional[Path] = None) -> StudySpec:
    """Build the study specification from a study file and/or flags; flags given win over the file's keys.

    Without ``--study``, DATA, ``--outcome``, ``--treatment`` and ``--site`` are required.  Missing flags and
    the paths (:func:`check_paths`, including ``out``) are checked before the intake modules are imported.
    """
    given: dict[str, Any] = {
        "data": flags.data, "outcome": flags.outcome, "treatment": flags.treatment, "site": flags.site,
        "treated_value": flags.treated_value, "id": flags.id, "cost": flags.cost, "stratum": flags.stratum,
        "cluster": flags.cluster,
        "margin": flags.margin, "seed": flags.seed, "encoding": flags.encoding,
        "covariates": split_list(flags.covariates), "rates": flags.rates,
        "keep_columns": flags.keep_column or None, "drop_columns": flags.drop_column or None,
        "site_derived": flags.site_derived or None,
    }
    given = {key: value for key, value in given.items() if value is not None}
    if flags.study is None:
        for key, flag in REQUIRED:
            if key not in given:
                raise SiteproofError(
                    f"{flag} is missing",
                    f"give {flag} (see `siteproof run --help`) or describe the study with --study FILE.toml",
                )
    if flags.seed is not None:
        check_seed(flags.seed)
    check_paths(flags, out)
    from .spec import check_spec
    from .study import StudySpec, load_spec_toml, parse_rates

    if "rates" in given:
        given["rates"] = parse_rates(given["rates"])
    spec = load_spec_toml(flags.study, overrides=given) if flags.study is not None else StudySpec(**given)
    check_spec(spec)
    return spec
