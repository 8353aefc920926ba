"""What every report section reads from a run: the claims and scorecard records, the effect unit and margin.

:class:`RunView` wraps the two JSON records (``claims.json`` and ``scorecard.json`` content) and formats
effects with the decimals the margin calls for; the notes shared by several tables are here too.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from .figures import Interval
from .document import Verdict
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


def plan_note(run: RunView) -> str:
    """The footnote that states the locked plan: alpha, multiplicity, the margin of each family, its hash."""
    plan = run.card.get("plan") or {}
    rules = plan.get("margin_rules") or {}
    margins = "; ".join(f"{family}: {text}" for family, text in rules.items())
    return (f"Locked analysis plan (sha256 {str(plan.get('sha256', '—'))[:12]}…): α = {plan.get('alpha', '—')}, "
            f"{plan.get('multiplicity', '—')} adjustment within each claim family (difference and equivalence "
            f"p-values alike), primary claims {', '.join(plan.get('primary') or []) or '—'}; margins — {margins}. "
            "The naive difference in means is a reference, adjusted with no other claim and never primary.")


def deviation_texts(run: RunView) -> list[str]:
    """One sentence per deviation from the locked plan (shown in red wherever verdicts are shown)."""
    return [f"Deviation from the locked analysis plan: {d.get('field')} {d.get('planned')} → {d.get('used')}."
            for d in (run.card.get("plan") or {}).get("deviations") or []]


def verdict_rows(run: RunView) -> dict[str, dict]:
    """The scorecard's verdicts table keyed by claim id."""
    return {r["claim"]: r for r in run.card.get("verdicts") or []}


def adjusted_word(run: RunView, claim: str, raw: Any) -> str:
    """The claim's multiplicity-adjusted verdict (the one every summary counts); ``raw`` if it has no row."""
    row = verdict_rows(run).get(claim)
    return str(row["verdict_adjusted"]) if row else str(raw or "")


def verdict_cell(run: RunView, claim: str, raw: Any, note: str = "") -> Verdict:
    """A verdict cell: the adjusted verdict, with the unadjusted one beside it when they differ."""
    word = adjusted_word(run, claim, raw)
    notes = [note] if note else []
    if raw and str(raw) != word:
        notes.append(f"unadjusted: {raw}")
    return Verdict(word, "; ".join(notes))


def margin_note(run: RunView) -> str:
    """The footnote that states δ and where it came from."""
    source = run.study.get("margin_source") or "user-set or default"
    return (f"δ = {run.num(run.margin)} {run.unit} is the equivalence margin of the average-effect family — "
            f"{source}; a difference smaller than δ is treated as unimportant. Rule gains and ranking contrasts use "
            "min(δ, half their blind value) and BLP β₂ its own slope-scale margin (column 'margin' of the verdicts).")


def paired_note() -> str:
    """The footnote that explains the paired SE of D."""
    return ("D = blind − design is computed on the same units; its SE is the SD of the per-unit differences of the "
            "two scores divided by √n (paired), never the two SEs added.")

