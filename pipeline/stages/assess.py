"""Assess: reliability rules, giving every cell a status and its reason codes.

Rules (DESIGN §4; the defaults are common practice, to be set by the office's own standards):
* no sample in the cell -> suppressed (no_sample)
* n < min_sample -> suppressed (sample_too_small)
* n·p̂ or n·q̂ below min_expected, on the effective or the sample n -> suppressed or caution
  (expected_count_low); the normal approximation behind the margin of error needs both
* cv >= cv_suppress -> suppressed (cv_too_high); cv >= cv_caution -> caution (cv_high);
  the cv of p̂ = 0 is undefined and that cell is judged by the expected-count rule alone
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline.flags import Reason, Status, apply_rule, empty_outcome

RULE_COLUMNS = ["rule_no_sample", "rule_sample_too_small", "rule_expected_count_low", "rule_cv_high",
                "rule_cv_too_high"]


def assess(frame: pd.DataFrame, config) -> tuple[pd.DataFrame, np.ndarray, list[list[str]]]:
    """Adds one boolean column per rule outcome; returns the frame with the running status
    severity and reasons, which `protect` completes."""
    rel = config.reliability
    f = frame.copy()
    n = f["sample_size"].to_numpy(dtype=np.float64)
    p = f["estimate"].to_numpy()
    basis = f["effective_n"].to_numpy() if rel.expected_basis == "effective" else n
    cv = f["cv"].to_numpy()
    sampled = n > 0
    with np.errstate(invalid="ignore"):
        f["rule_no_sample"] = ~sampled
        f["rule_sample_too_small"] = sampled & (n < rel.min_sample)
        f["rule_expected_count_low"] = sampled & ((basis * p < rel.min_expected) | (basis * (1 - p) < rel.min_expected))
        f["rule_cv_too_high"] = sampled & (np.nan_to_num(cv, nan=0.0) >= rel.cv_suppress)
        f["rule_cv_high"] = sampled & ~f["rule_cv_too_high"].to_numpy() & (np.nan_to_num(cv, nan=0.0) >= rel.cv_caution)
    severity, reasons = empty_outcome(len(f))
    normal_fail = Status.SUPPRESSED if rel.on_normal_approx_failure == "suppress" else Status.CAUTION
    for column, reason, status in (("rule_no_sample", Reason.NO_SAMPLE, Status.SUPPRESSED),
                                   ("rule_sample_too_small", Reason.SAMPLE_TOO_SMALL, Status.SUPPRESSED),
                                   ("rule_expected_count_low", Reason.EXPECTED_COUNT_LOW, normal_fail),
                                   ("rule_cv_high", Reason.CV_HIGH, Status.CAUTION),
                                   ("rule_cv_too_high", Reason.CV_TOO_HIGH, Status.SUPPRESSED)):
        apply_rule(severity, reasons, f[column].to_numpy(), reason, status)
    return f, severity, reasons
