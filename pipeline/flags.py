"""The vocabulary of a cell's outcome: status, reason codes and the notes a reader sees.

Codes are stable snake_case values: they appear in the public files and users filter on them.
Add a member to add a rule; never rename one.
"""

from __future__ import annotations

from enum import Enum

import numpy as np
import pandas as pd


class Status(str, Enum):
    PUBLISHED = "published"     # figures printed without reservation
    CAUTION = "caution"         # figures printed, to be read with care
    SUPPRESSED = "suppressed"   # figures withheld


SEVERITY = {Status.PUBLISHED: 0, Status.CAUTION: 1, Status.SUPPRESSED: 2}


class Reason(str, Enum):
    NO_SAMPLE = "no_sample"
    SAMPLE_TOO_SMALL = "sample_too_small"
    EXPECTED_COUNT_LOW = "expected_count_low"
    CV_HIGH = "cv_high"
    CV_TOO_HIGH = "cv_too_high"
    FEW_RESPONDENTS = "few_respondents"
    COMPLEMENTARY = "complementary"   # hidden so that a confidential neighbour cannot be worked out
    EFFECTIVE_N_TOO_SMALL = "effective_n_too_small"
    CI_TOO_WIDE = "ci_too_wide"
    DF_LOW = "df_low"
    ESTIMATE_AT_BOUNDARY = "estimate_at_boundary"


def reason_descriptions(config) -> dict[str, str]:
    """What each code means, with the thresholds in force, for metadata.json and the notes."""
    rel, dis = config.reliability, config.disclosure
    basis = "effective sample size" if rel.expected_basis == "effective" else "sample size"
    action = "withheld" if rel.on_normal_approx_failure == "suppress" else "printed with a caution"
    return {
        Reason.NO_SAMPLE.value: "No sampled record falls in this cell (or the cell lies outside the indicator's "
                                "universe); there is no estimate.",
        Reason.SAMPLE_TOO_SMALL.value:
            f"Fewer than {rel.min_sample} sampled records in the base; the figure is withheld.",
        Reason.EXPECTED_COUNT_LOW.value:
            f"The {basis} times the proportion, or times its complement, is below {rel.min_expected:g}; "
            f"the normal approximation behind the margin of error may not hold, so the figure is {action}.",
        Reason.CV_HIGH.value:
            f"Coefficient of variation of at least {rel.cv_caution:.0%}; the figure is imprecise, use with caution.",
        Reason.CV_TOO_HIGH.value:
            f"Coefficient of variation of at least {rel.cv_suppress:.0%}; the figure is too unreliable to print.",
        Reason.EFFECTIVE_N_TOO_SMALL.value:
            "Effective sample size under 30 (NCHS standard, Parker et al. 2017); the figure is withheld.",
        Reason.CI_TOO_WIDE.value:
            "The 95% confidence interval is 30 percentage points wide or more, or wider than 5 points "
            "and more than 130% of the estimate (NCHS standard, Parker et al. 2017); withheld.",
        Reason.DF_LOW.value:
            "Fewer than 8 design degrees of freedom; the interval may be unstable. Flagged for review "
            "(NCHS standard, Parker et al. 2017).",
        Reason.ESTIMATE_AT_BOUNDARY.value:
            "The estimate is 0 or 1; flagged for review (NCHS standard, Parker et al. 2017).",
        Reason.FEW_RESPONDENTS.value:
            f"Fewer than {dis.min_respondents} sampled persons have, or lack, the characteristic"
            + (f" (in a cell of fewer than {dis.unanimous_below} sampled persons, possibly none)"
               if dis.unanimous_below else "")
            + "; withheld so that no respondent can be singled out.",
        # one code for the threshold and the unanimous rule: a code saying 'all or none' would
        # itself tell a reader what the withheld figure hides
        Reason.COMPLEMENTARY.value:
            "Withheld so that a confidential figure cannot be worked out: by subtraction from published "
            "totals nearby, or from the sample size and base this row would print, which an indicator over "
            "the same persons shares with it; this figure itself may be reliable.",
    }


def empty_outcome(n_cells: int) -> tuple[np.ndarray, list[list[str]]]:
    return np.zeros(n_cells, dtype=np.int8), [[] for _ in range(n_cells)]


def apply_rule(severity: np.ndarray, reasons: list[list[str]], mask: np.ndarray, reason: Reason,
               status: Status) -> None:
    """Record `reason` on the cells in `mask` and raise their status to at least `status`."""
    mask = np.asarray(mask, dtype=bool)
    for i in np.flatnonzero(mask):
        reasons[i].append(reason.value)
    severity[mask] = np.maximum(severity[mask], SEVERITY[status])


def settle(frame: pd.DataFrame, severity: np.ndarray, reasons: list[list[str]], descriptions: dict[str, str]) -> None:
    """Write status, reasons and note columns into `frame`. A few combinations of codes recur
    over every cell: each is joined and described once and its cells take it by index (a note runs
    to hundreds of characters; joined cell by cell, the S benchmark's 467,000 notes took 1.7 s)."""
    names = np.array([s.value for s in Status], dtype=object)
    frame["status"] = names[severity]
    which, combinations = pd.factorize(np.array([";".join(r) for r in reasons], dtype=object))
    combinations = np.asarray(combinations, dtype=object)
    notes = np.array([" ".join(descriptions[c] for c in codes.split(";") if c) for codes in combinations],
                     dtype=object)
    frame["reasons"] = combinations[which]
    frame["note"] = notes[which]
