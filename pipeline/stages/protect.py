"""Protect: disclosure control. This stage alone decides what is withheld.

Primary suppression by the threshold rule on unweighted counts: a cell is withheld when
0 < x < k or 0 < n − x < k (k = disclosure.min_respondents), so that no small group of
respondents who have, or lack, the characteristic can be singled out. The rule and its threshold
defer to the office's confidentiality rules and local law.

Complementary suppression (so that withheld cells cannot be recovered by subtraction) is not in
this version; the config refuses `complementary: true` rather than pretend.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline.flags import Reason, Status, apply_rule, reason_descriptions, settle


def protect(frame: pd.DataFrame, severity: np.ndarray, reasons: list[list[str]], config) -> pd.DataFrame:
    f = frame.copy()
    k = config.disclosure.min_respondents
    n = f["sample_size"].to_numpy()
    x = f["respondents"].to_numpy()
    f["rule_few_respondents"] = ((x > 0) & (x < k)) | ((n - x > 0) & (n - x < k))
    apply_rule(severity, reasons, f["rule_few_respondents"].to_numpy(), Reason.FEW_RESPONDENTS, Status.SUPPRESSED)
    settle(f, severity, reasons, reason_descriptions(config))
    return f


FIGURE_COLUMNS = ["estimate", "std_error", "ci_lower", "ci_upper", "margin_of_error", "cv", "sample_size",
                  "weighted_base", "weighted_count", "design_effect", "effective_n"]


def public_columns(domain_names) -> list[str]:
    return (["indicator", "geo_level", "geo_code", "geo_name", *domain_names, *FIGURE_COLUMNS,
             "status", "reasons", "note"])


def public_estimates(frame: pd.DataFrame, config, domain_names) -> pd.DataFrame:
    """The public table: every figure of a suppressed cell emptied, weighted counts rounded to
    `disclosure.round_counts_to` (0 = unrounded), columns in the contract's order."""
    out = frame[public_columns(domain_names)].copy()
    out["sample_size"] = out["sample_size"].astype("float64")
    step = config.disclosure.round_counts_to
    if step:
        for col in ("weighted_base", "weighted_count"):
            out[col] = np.floor(out[col].to_numpy() / step + 0.5) * step  # halves round up
    withheld = out["status"].to_numpy() == Status.SUPPRESSED.value
    for col in FIGURE_COLUMNS:
        out.loc[withheld, col] = np.nan
    out["sample_size"] = out["sample_size"].astype("Int64")
    return out.reset_index(drop=True)
