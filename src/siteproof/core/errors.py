"""The one error type for user mistakes, and the warning channel.

Every mistake a user can make (a missing file, an unknown column, a rate outside (0, 1), ...) raises
:class:`SiteproofError` carrying two parts: *what* went wrong and *how to fix* it.  The command line prints
``error: <what> — <how to fix>`` on one line and exits with status 2; Python callers catch the exception.
Anything else that escapes is a bug in siteproof, not a user mistake.
"""

from __future__ import annotations

import warnings


class SiteproofError(Exception):
    """A user mistake: ``what`` went wrong and ``fix`` says how to put it right."""

    def __init__(self, what: str, fix: str) -> None:
        self.what = what.strip().rstrip(".")
        self.fix = fix.strip().rstrip(".")
        super().__init__(f"{self.what} — {self.fix}")

    def one_line(self) -> str:
        """The single line the CLI prints: ``error: <what> — <how to fix>`` with newlines folded."""
        return " ".join(f"error: {self}".split())


class SiteproofWarning(UserWarning):
    """A problem worth telling the user that does not stop the analysis (e.g. a site with one arm)."""


def warn(message: str) -> None:
    """Issue a :class:`SiteproofWarning`; callers also record the text in their result objects."""
    warnings.warn(message, SiteproofWarning, stacklevel=2)
