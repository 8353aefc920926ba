"""Report section 8: methods and their published sources, software versions, seeds and timings."""

from __future__ import annotations

import platform

from .. import __version__
from .context import RunView, plan_note
from .document import Caution, Facts, Heading, Section, Table, Verdict
from .formatting import fmt, fmt_p


CAUTION = (
    "This report is statistical evidence, not proof. Each verdict is a statement about estimates under stated "
    "assumptions and an equivalence margin, and it can be wrong. Results may feed decisions about people: "
    "ethics review, informed consent and data-use agreements apply to any data analysed with siteproof, and "
    "local regulations and qualified review take precedence over anything reported here."
)

REFERENCES = (
    ("Design-based estimates", "Neyman (1923); Horvitz & Thompson (1952); exact binomial test of the treated count"),
    ("Regression adjustment, HC2", "Lin (2013), Ann. Appl. Stat.; Imbens & Kolesár (2016)"),
    ("IPW, AIPW", "Horvitz & Thompson (1952); Robins, Rotnitzky & Zhao (1994)"),
    ("Cross-fitting", "Chernozhukov et al. (2018), double/debiased machine learning"),
    ("Overlap", "Crump, Hotz, Imbens & Mitnik (2009); Li, Morgan & Zaslavsky (2018) overlap weights; "
     "Austin (2009) standardized differences; Kish (1965) effective sample size"),
    ("CATE models", "Künzel, Sekhon, Bickel & Yu (2019) meta-learners; Nie & Wager (2021) R-learner and "
     "R-loss; Kennedy (2023) DR-learner"),
    ("BLP, GATES", "Chernozhukov, Demirer, Duflo & Fernández-Val, generic ML inference on heterogeneous effects"),
    ("TOC, AUTOC, Qini", "Yadlowsky, Fleming, Shah, Brunskill & Wager, rank-weighted average treatment effects"),
    ("Treatment rules", "Imai & Li (2023) evaluating individualized rules; Athey & Wager (2021) policy learning"),
    ("Random effects", "DerSimonian & Laird (1986); Viechtbauer (2005, 2010) REML; Higgins & Thompson (2002) "
     "I²; Higgins, Thompson & Spiegelhalter (2009) prediction intervals"),
    ("Paired comparison, verdicts", "Schuirmann (1987) two one-sided tests; Tryon & Lewis (2008) four "
     "verdict classes; Shadish, Clark & Steiner (2008) percent bias reduction"),
    ("Multiplicity", "Holm (1979) step-down; Benjamini & Hochberg (1995) false discovery rate"),
    ("Margins", "Wellek (2010) and Lakens (2017) equivalence testing; FDA (2016) non-inferiority margins"),
    ("Within-study comparisons", "Cook, Shadish & Wong (2008); Steiner & Wong (2018); Gentzel, Pruthi & Jensen "
     "(2021) observational samples from RCTs"),
    ("Colours", "Okabe & Ito (2008) colour-universal-design palette"),
)



def _software() -> tuple[tuple[str, str], ...]:
    import matplotlib
    import numpy
    import pandas
    import scipy
    import sklearn
    import statsmodels

    return (("Python", platform.python_version()), ("numpy", numpy.__version__), ("pandas", pandas.__version__),
            ("scikit-learn", sklearn.__version__), ("scipy", scipy.__version__),
            ("statsmodels", statsmodels.__version__), ("matplotlib", matplotlib.__version__))


def methods_section(run: RunView) -> Section:
    settings = run.claims.get("settings") or {}
    timings = run.claims.get("timings") or {}
    methods = Table(
        "Methods and their sources",
        ["what", "sources"], [[what, src] for what, src in REFERENCES],
        ["Formulas: docs/methods.md and the methods pages it links; this report's sections: docs/report.md."],
        text=(0, 1),
    )
    facts = (
        ("siteproof (claims)", str(run.claims.get("siteproof_version", "—"))),
        ("siteproof (scorecard)", str(run.card.get("siteproof_version", "—"))),
        ("siteproof (report)", __version__),
        *_software(),
        ("seed of the blind analysis", str(settings.get("seed", "—"))),
        ("seed of unmasking", str(run.study.get("seed", "—"))),
        ("cross-fitting folds", str(settings.get("folds", "—"))),
        ("bootstrap draws (half-samples)", str(settings.get("n_boot", "—"))),
        ("propensity clipping", str(settings.get("clip", "—"))),
        ("CATE models", ", ".join(settings.get("models") or []) or "—"),
        ("input fingerprint (SHA-256)", str(run.claims.get("fingerprint", "—"))),
    )
    timing_table = Table(
        "Time spent by the blind analysis (seconds)",
        ["stage", "seconds"], [[k, fmt(v, 2)] for k, v in timings.items()],
        ["Wall-clock seconds of each stage on the machine that ran it; they vary from run to run."],
    )
    parts = [Caution(CAUTION), methods, _verdicts_table(run), Heading("Software, seeds and input"), Facts(facts),
             timing_table]
    reading = (
        f"The average-effect verdicts above use the margin δ = {run.num(run.margin)} {run.unit}, the other claims "
        "their own family's margin (all locked in the blind plan and listed below), and paired differences on the "
        "same units; the methods and their sources are listed below.",
        f"Rerunning with the same input (fingerprint {str(run.claims.get('fingerprint', '—'))[:12]}…) and seed "
        f"{settings.get('seed', '—')} reproduces every number except the timings.",
    )
    return Section("methods", "Methods and references", reading, parts)


def _verdicts_table(run: RunView) -> Table:
    """Every scored claim with its margin, equivalence bound, raw and adjusted p-values and verdicts."""
    rows = []
    for r in run.card.get("verdicts") or []:
        diff = r.get("difference") or {}
        rows.append([r.get("claim"), r.get("family"), "yes" if r.get("primary") else "", run.est_ci(diff),
                     run.num(r.get("margin")), run.num(r.get("equivalence_bound")),
                     f"{fmt_p(r.get('p_difference'))} / {fmt_p(r.get('p_difference_adjusted'))}",
                     f"{fmt_p(r.get('p_equivalence'))} / {fmt_p(r.get('p_equivalence_adjusted'))}",
                     Verdict(str(r.get("verdict", ""))), Verdict(str(r.get("verdict_adjusted", "")))])
    return Table(
        "Every verdict: raw and adjusted for multiplicity (within each family; primary claims apart; naive never "
        "adjusted)",
        ["claim", "family", "primary", "D = blind − design [95 % CI]", "margin", "equivalence bound",
         "p (D = 0) raw / adjusted", "p (TOST) raw / adjusted", "verdict", "verdict (adjusted)"],
        rows,
        [plan_note(run), "Equivalence bound: the smallest margin at which D would be called equivalent, "
         "max(|low|, |high|) of its 90 % CI. Units: those of each claim (outcome units; β₂ is a slope)."],
        text=(0, 1, 2),
    )
