"""Primary disclosure rule and the public view (DESIGN §3): a cell is withheld when
0 < x < k or 0 < n − x < k on unweighted counts (threshold rule, common practice)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipeline.config import load_config
from pipeline.flags import empty_outcome
from pipeline.stages.protect import FIGURE_COLUMNS, protect, public_columns, public_estimates
from tests.conftest import DEMO_CONFIG


@pytest.fixture(scope="module")
def config():
    return load_config(DEMO_CONFIG)  # min_respondents 5, round_counts_to 10


def frame(rows):
    f = pd.DataFrame(rows, columns=["sample_size", "respondents", "weighted_base", "weighted_count"])
    for col in ("indicator", "geo_level", "geo_code", "geo_name", "sex", "age_group"):
        f[col] = "x"
    f["estimate"] = f["weighted_count"] / f["weighted_base"]
    for col in ("std_error", "ci_lower", "ci_upper", "margin_of_error", "cv", "design_effect", "effective_n"):
        f[col] = 0.01
    return f


def run_protect(config, rows):
    f = frame(rows)
    severity, reasons = empty_outcome(len(f))
    return protect(f, severity, reasons, config)


def test_threshold_rule(config):
    # (n, x): x = 4 < 5 withheld; x = 5 not; n − x = 4 withheld; x = 0 and x = n are not this rule's business
    out = run_protect(config, [(100, 4, 1000, 40), (100, 5, 1000, 50), (100, 96, 1000, 960),
                               (100, 0, 1000, 0), (100, 100, 1000, 1000)])
    assert out["rule_few_respondents"].tolist() == [True, False, True, False, False]
    assert out["status"].tolist() == ["suppressed", "published", "suppressed", "published", "published"]
    assert out["reasons"].tolist()[0] == "few_respondents"
    assert "singled out" in out["note"].iloc[0]


def test_public_view_empties_every_figure_of_a_withheld_cell(config):
    out = public_estimates(run_protect(config, [(100, 4, 1234, 44), (100, 50, 1234, 615)]), config,
                           ["sex", "age_group"])
    assert list(out.columns) == public_columns(["sex", "age_group"])
    assert out.loc[0, FIGURE_COLUMNS].isna().all()
    assert out.loc[1, FIGURE_COLUMNS].notna().all()


def test_weighted_counts_rounded_half_up(config):
    out = public_estimates(run_protect(config, [(100, 50, 1235, 615), (100, 50, 1234, 614)]), config,
                           ["sex", "age_group"])
    assert out["weighted_base"].tolist() == [1240.0, 1230.0]
    assert out["weighted_count"].tolist() == [620.0, 610.0]
    # the estimate is computed before rounding and is not changed by it
    assert out.loc[0, "estimate"] == pytest.approx(615 / 1235)
