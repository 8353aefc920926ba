"""The file layout of a holdout benchmark: folder and file names, reserved columns, schemas.

``BENCH/public/`` holds the exam (data file, task sheet, submission templates), ``BENCH/key/`` the sealed key
(key.json, units.csv, leak_audit.csv); grading writes the leaderboard files into a folder of its own.
"""

from __future__ import annotations

from pathlib import Path
from typing import Sequence

from ..core.errors import SiteproofError

KEY_SCHEMA = "siteproof/holdout-key"
LEADERBOARD_SCHEMA = "siteproof/leaderboard"
FORMAT_VERSION = 2
TOKEN = "token"
PART = "part"
CLUSTER = "cluster"
PUBLIC_DATA = "data.csv"
TASK_SHEET = "task.md"
TEMPLATE_CSV = "submission_template.csv"
TEMPLATE_TOML = "submission_template.toml"
KEY_FILE = "key.json"
KEY_UNITS = "units.csv"
KEY_AUDIT = "leak_audit.csv"
KEY_SECRET = "secret.txt"
KEY_UNIT_COLUMNS = ("token", "row_key", "site", "stratum", "rate", "graded", "y", "w", "cost", "mu0", "mu1")
KEY_FILES = (KEY_UNITS, KEY_AUDIT, KEY_SECRET)  # covered by the SHA-256 list in key.json
DEFAULT_HOLDOUT_SHARE = 0.3
SPREADSHEET_TRIGGERS = ("=", "+", "-", "@", "\t", "\r")
LEADERBOARD_FILES = ("leaderboard.csv", "leaderboard.json", "leaderboard.html", "sites.csv")


def refuse_earlier(out: Path, names: Sequence[str], holds: str, force: bool) -> None:
    """Refuse a folder holding any of ``names`` (``holds`` says what, e.g. "a benchmark") unless ``force``."""
    earlier = [name for name in names if (out / name).exists()]
    if earlier and not force:
        raise SiteproofError(f"output folder {out} already holds {holds} ({', '.join(earlier)})",
                             "choose another --out folder or add --force to overwrite it")


def spreadsheet_safe(text: str) -> str:
    """A text cell a spreadsheet will not run as a formula: a leading = + - @ tab or CR gets a ' in front.

    Common practice against CSV formula injection (the OWASP "CSV Injection" guidance).
    """
    return "'" + text if text.startswith(SPREADSHEET_TRIGGERS) else text
