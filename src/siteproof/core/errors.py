"""The one error type for user mistakes, and the warning channel.

Every mistake a user can make (a missing file, an unknown column, a rate outside (0, 1), ...) raises
:class:`SiteproofError` carrying two parts: *what* went wrong and *how to fix* it.  The command line prints
``error: <what> — <how to fix>`` on one line and exits with status 2; Python callers catch the exception.
Anything else that escapes is a bug in siteproof, not a user mistake: the command line writes its traceback
to a log file (:func:`write_crash_log`), prints one line naming that file and exits with status 3.
"""

from __future__ import annotations

import os
import platform
import tempfile
import time
import traceback
import warnings
from pathlib import Path


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


def crash_log_dir() -> Path:
    """Where internal-error logs go: ``$SITEPROOF_LOG_DIR``, else ``<temp dir>/siteproof-logs``."""
    return Path(os.environ.get("SITEPROOF_LOG_DIR") or Path(tempfile.gettempdir()) / "siteproof-logs")


def write_crash_log(exc: BaseException, argv: list[str]) -> Path:
    """Write the traceback of an internal error, the command and the versions to a new log file."""
    from .. import __version__

    folder = crash_log_dir()
    folder.mkdir(parents=True, exist_ok=True)
    stamp = time.strftime("%Y%m%d-%H%M%S", time.gmtime())
    fd, name = tempfile.mkstemp(prefix=f"crash-{stamp}-", suffix=".log", dir=folder)
    text = (f"siteproof {__version__} on Python {platform.python_version()} ({platform.platform()})\n"
            f"command: siteproof {' '.join(argv)}\n\n" + "".join(traceback.format_exception(exc)))
    with os.fdopen(fd, "w", encoding="utf-8") as fh:
        fh.write(text)
    return Path(name)


def internal_error_line(exc: BaseException, argv: list[str]) -> str:
    """The one line printed for a bug in siteproof: what broke and the log file holding the traceback."""
    what = " ".join(f"{type(exc).__name__}: {exc}".split())[:300]
    try:
        where = f"the traceback is in {write_crash_log(exc, argv)}"
    except OSError as log_error:
        where = f"the traceback could not be saved ({log_error.strerror or log_error})"
    return f"internal error: {what} — this is a bug in siteproof, not in your input; {where}; please report it"
