"""Assess: reliability rules, giving every cell a status and its reason codes.

Two sets of rules. `standard: custom` (DESIGN §4; the defaults are common practice, to be set by
the office's own standards):
* no sample in the cell -> suppressed (no_sample)
* n < min_sample -> suppressed (sample_too_small)
* n·p̂ or n·q̂ below min_expected, on the effective or the sample n -> suppressed or caution
  (expected_count_low); the normal approximation behind the margin of error needs both
* cv >= cv_suppress -> suppressed (cv_too_high); cv >= cv_caution -> caution (cv_high);
  the cv of p̂ = 0 is undefined and that cell is judged by the expected-count rule alone
`standard: nchs_2017` replaces those with the NCHS presentation standard (see _nchs_2017_rules).
A cell without sample is withheld under both (no_sample).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline.flags import Reason, Status, apply_rule, empty_outcome

# NCHS Data Presentation Standards for Proportions (Parker et al. 2017, Vital Health Stat 2(175))
NCHS_MIN_EFFECTIVE_N = 30
NCHS_MAX_WIDTH = 0.30
NCHS_RELATIVE_WIDTH_FROM = 0.05
NCHS_MAX_RELATIVE_WIDTH = 1.30
NCHS_MIN_DF = 8


def assess(frame: pd.DataFrame, config) -> tuple[pd.DataFrame, np.ndarray, list[list[str]]]:
    """Adds one boolean `rule_*` column per rule outcome; returns the frame with the running
    status severity and reasons, which `protect` completes."""
    f = frame.copy()
    sampled = f["sample_size"].to_numpy() > 0
    f["rule_no_sample"] = ~sampled
    rules = [("rule_no_sample", Reason.NO_SAMPLE, Status.SUPPRESSED)]
    if config.reliability.standard == "nchs_2017":
        rules += _nchs_2017_rules(f, sampled)
    else:
        rules += _custom_rules(f, sampled, config.reliability)
    severity, reasons = empty_outcome(len(f))
    for column, reason, status in rules:
        apply_rule(severity, reasons, f[column].to_numpy(), reason, status)
    return f, severity, reasons


def _custom_rules(f: pd.DataFrame, sampled: np.ndarray, rel) -> list[tuple[str, Reason, Status]]:
    n = f["sample_size"].to_numpy(dtype=np.float64)
    p = f["estimate"].to_numpy()
    basis = f["effective_n"].to_numpy() if rel.expected_basis == "effective" else n
    cv = np.nan_to_num(f["cv"].to_numpy(), nan=0.0)
    with np.errstate(invalid="ignore"):
        f["rule_sample_too_small"] = sampled & (n < rel.min_sample)
        f["rule_expected_count_low"] = sampled & ((basis * p < rel.min_expected) | (basis * (1 - p) < rel.min_expected))
        f["rule_cv_too_high"] = sampled & (cv >= rel.cv_suppress)
        f["rule_cv_high"] = sampled & (cv >= rel.cv_caution) & (cv < rel.cv_suppress)
    normal_fail = Status.SUPPRESSED if rel.on_normal_approx_failure == "suppress" else Status.CAUTION
    return [("rule_sample_too_small", Reason.SAMPLE_TOO_SMALL, Status.SUPPRESSED),
            ("rule_expected_count_low", Reason.EXPECTED_COUNT_LOW, normal_fail),
            ("rule_cv_high", Reason.CV_HIGH, Status.CAUTION),
            ("rule_cv_too_high", Reason.CV_TOO_HIGH, Status.SUPPRESSED)]


def _nchs_2017_rules(f: pd.DataFrame, sampled: np.ndarray) -> list[tuple[str, Reason, Status]]:
    """Parker et al. 2017: withhold when the effective n is under 30, when the Korn–Graubard 95%
    interval is 30 points wide or more, or when it is wider than 5 points and its width exceeds
    130% of the estimate; flag for review when df < 8 or p̂ is 0 or 1."""
    p = f["estimate"].to_numpy()
    width = f["ci_upper"].to_numpy() - f["ci_lower"].to_numpy()
    with np.errstate(invalid="ignore", divide="ignore"):
        relative = np.where(p > 0, width / p, np.inf)
        f["rule_effective_n_too_small"] = sampled & (f["effective_n"].to_numpy() < NCHS_MIN_EFFECTIVE_N)
        f["rule_ci_too_wide"] = sampled & ((width >= NCHS_MAX_WIDTH) | (
            (width > NCHS_RELATIVE_WIDTH_FROM) & (relative > NCHS_MAX_RELATIVE_WIDTH)))
        f["rule_df_low"] = sampled & (f["degrees_of_freedom"].to_numpy() < NCHS_MIN_DF)
        f["rule_estimate_at_boundary"] = sampled & ((p == 0) | (p == 1))
    return [("rule_effective_n_too_small", Reason.EFFECTIVE_N_TOO_SMALL, Status.SUPPRESSED),
            ("rule_ci_too_wide", Reason.CI_TOO_WIDE, Status.SUPPRESSED),
            ("rule_df_low", Reason.DF_LOW, Status.CAUTION),
            ("rule_estimate_at_boundary", Reason.ESTIMATE_AT_BOUNDARY, Status.CAUTION)]
