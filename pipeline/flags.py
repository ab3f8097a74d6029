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
        Reason.FEW_RESPONDENTS.value:
            f"Fewer than {dis.min_respondents} sampled persons have, or lack, the characteristic; "
            "withheld so that no respondent can be singled out.",
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
    """Write status, reasons and note columns into `frame`."""
    names = np.array([s.value for s in Status], dtype=object)
    frame["status"] = names[severity]
    frame["reasons"] = [";".join(r) for r in reasons]
    frame["note"] = [" ".join(descriptions[c] for c in r) for r in reasons]
