"""The notebook face shared by every result object: compact repr, a printable summary, an HTML table, a tidy frame.

A result class implements two small hooks — :meth:`ResultsMixin._key_numbers` (a few headline figures) and
:meth:`ResultsMixin.to_frame` (a tidy pandas table, one row per figure) — and inherits the rest once.
"""

from __future__ import annotations

import html
import math
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    import pandas as pd

REPR_LIMIT = 1000


class Summary(str):
    """A plain-text table that prints as itself (``print(result.summary())`` or just ``result.summary()``)."""

    def __repr__(self) -> str:
        return str(self)


def _plain(value: Any) -> str:
    """A short text form of one cell: floats to 4 significant digits, missing values as '—'."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "—"
    if isinstance(value, float):
        return f"{value:.4g}"
    return str(value)


class ResultsMixin:
    """Compact ``__repr__``, ``summary()``, ``_repr_html_()`` built on ``_key_numbers()`` and ``to_frame()``."""

    def _key_numbers(self) -> dict[str, Any]:
        """A few headline figures for the one-line repr (no arrays)."""
        raise NotImplementedError

    def to_frame(self) -> pd.DataFrame:
        """A tidy table of the result, one row per figure."""
        raise NotImplementedError

    def _title(self) -> str:
        return type(self).__name__

    def __repr__(self) -> str:
        inner = ", ".join(f"{k}={_plain(v)}" for k, v in self._key_numbers().items())
        text = f"{self._title()}({inner})"
        return text if len(text) < REPR_LIMIT else text[: REPR_LIMIT - 4] + "…)"

    def summary(self) -> Summary:
        """A printable plain-text table: the title line, then :meth:`to_frame` with rounded numbers."""
        frame = self.to_frame()
        body = frame.map(_plain).to_string(index=False) if len(frame) else "(no rows)"
        return Summary(f"{self!r}\n{body}")

    def _repr_html_(self) -> str:
        """An HTML table of :meth:`to_frame` under an escaped title (rendered by notebooks)."""
        frame = self.to_frame().map(_plain)
        return f"<p><b>{html.escape(repr(self))}</b></p>\n" + frame.to_html(index=False, escape=True)
