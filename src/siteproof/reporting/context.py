"""What every report section reads from a run: the claims and scorecard records, the effect unit and margin.

:class:`RunView` wraps the two JSON records (``claims.json`` and ``scorecard.json`` content) and formats
effects with the decimals the margin calls for; the notes shared by several tables are here too.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from .figures import Interval
from .formatting import as_float, effect_decimals, finite, fmt, fmt_ci


def interval(label: str, est: dict | None) -> Interval:
    """An {estimate, ci} record as a figure interval (missing → NaN)."""
    est = est or {}
    ci = est.get("ci") or [None, None]
    return Interval(label, as_float(est.get("estimate")), as_float(ci[0]), as_float(ci[1]))


@dataclass
class RunView:
    """The two input records and what every section needs from them."""

    claims: dict
    card: dict

    @property
    def study(self) -> dict:
        """The scorecard's study record."""
        return self.card.get("study") or {}

    @property
    def data(self) -> dict:
        """The claims' data record."""
        return self.claims.get("data") or {}

    @property
    def margin(self) -> float:
        """The equivalence margin δ."""
        return as_float(self.study.get("margin"))

    @property
    def d(self) -> int:
        """Decimals of every effect (see :func:`effect_decimals`)."""
        return effect_decimals(self.margin)

    @property
    def outcome(self) -> str:
        """The outcome column's name."""
        return str(self.study.get("outcome") or self.data.get("outcome") or "outcome")

    @property
    def unit(self) -> str:
        """The unit of every effect: differences of the outcome (a risk difference for a 0/1 outcome)."""
        if self.data.get("binary_outcome"):
            return f"risk difference in {self.outcome}"
        return f"{self.outcome} units"

    def num(self, value: Any) -> str:
        """An effect with the run's decimals."""
        return fmt(value, self.d)

    def ci(self, ci: Any) -> str:
        """An effect interval with the run's decimals."""
        return fmt_ci(ci, self.d)

    def est_ci(self, est: dict | None) -> str:
        """An {estimate, ci} record as the text 'estimate [low, high]'."""
        est = est or {}
        return f"{self.num(est.get('estimate'))} {self.ci(est.get('ci'))}" if finite(est.get("estimate")) else "—"

    def pair(self, first: Any, second: Any, decimals: int | None = None) -> str:
        """Two values as the text 'first → second' (blind → design)."""
        d = self.d if decimals is None else decimals
        return f"{fmt(first, d)} → {fmt(second, d)}"


def margin_note(run: RunView) -> str:
    """The footnote that states δ and where it came from."""
    source = run.study.get("margin_source") or "user-set or default"
    return (f"δ = {run.num(run.margin)} {run.unit} is the equivalence margin — {source}; a difference smaller "
            "than δ is treated as unimportant.")


def paired_note() -> str:
    """The footnote that explains the paired SE of D."""
    return ("D = blind − design is computed on the same units; its SE is the SD of the per-unit differences of the "
            "two scores divided by √n (paired), never the two SEs added.")

