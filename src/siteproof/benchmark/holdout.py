"""The holdout benchmark's public entry points: seal a multi-site trial, read its key, grade, write the leaderboard.

The work is done in one module per concept, all inside :mod:`siteproof.benchmark`:

* :mod:`~siteproof.benchmark.leakaudit` — does any published column give the site away;
* :mod:`~siteproof.benchmark.seal` — the public exam file and the sealed key (:func:`seal_benchmark`);
* :mod:`~siteproof.benchmark.tasksheet` — the students' task sheet and submission templates;
* :mod:`~siteproof.benchmark.key` — the teacher's key: writing, reading, the public file's SHA-256;
* :mod:`~siteproof.benchmark.keycheck` — the key's fields and its SHA-256 seals, checked on reading;
* :mod:`~siteproof.benchmark.submissions` — reading and validating student files;
* :mod:`~siteproof.benchmark.grade` — design-based metrics (:func:`grade_submissions`);
* :mod:`~siteproof.benchmark.standings` — the metrics, leaderboard rows, ranking and ties;
* :mod:`~siteproof.benchmark.leaderboard` — terminal table, HTML page, CSV/JSON/HTML files;
* :mod:`~siteproof.benchmark.layout` — file names, reserved columns and schemas.
"""

from __future__ import annotations

from .grade import grade_submissions
from .key import BenchmarkKey, read_key, sha256_of, verify_public
from .layout import PUBLIC_DATA
from .leaderboard import leaderboard_html, leaderboard_table, write_leaderboard, write_leaderboard_html
from .seal import SealResult, read_secret, seal_benchmark
from .standings import METRICS, GradedSubmission, Leaderboard, rank_entries
from .submissions import Submission, SubmittedATE, read_submission, submission_files

__all__ = [
    "BenchmarkKey", "GradedSubmission", "Leaderboard", "METRICS", "PUBLIC_DATA", "SealResult", "Submission",
    "SubmittedATE", "grade_submissions", "leaderboard_html", "leaderboard_table", "rank_entries", "read_key",
    "read_secret", "read_submission", "seal_benchmark", "sha256_of", "submission_files", "verify_public",
    "write_leaderboard", "write_leaderboard_html",
]
