"""Reliability rules at and around their thresholds. The thresholds are the common-practice
defaults of DESIGN §4 (n >= 30; n·p̂ and n·q̂ >= 10; CV flagged at 30%, withheld at 50%)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipeline.config import load_config
from pipeline.stages.assess import assess
from tests.conftest import DEMO_CONFIG, demo_settings, write_config


def cells(rows):
    f = pd.DataFrame(rows, columns=["sample_size", "estimate", "effective_n", "cv"])
    return f


def outcome(config, rows):
    f, severity, reasons = assess(cells(rows), config)
    return severity.tolist(), [";".join(r) for r in reasons]


@pytest.fixture(scope="module")
def config():
    return load_config(DEMO_CONFIG)


def test_sample_size_threshold_is_inclusive(config):
    # n = 29 is below 30 (common practice minimum); n = 30 passes. p̂ = 0.5 keeps other rules quiet.
    severity, reasons = outcome(config, [(29, 0.5, 29, 0.1), (30, 0.5, 30, 0.1)])
    assert reasons == ["sample_too_small", ""] and severity == [2, 0]


def test_expected_count_rule_on_effective_n(config):
    # n·p̂ = 100·0.0999 = 9.99 < 10 fails; 100·0.1 = 10 passes (common practice: both n·p̂ and n·q̂ >= 10)
    severity, reasons = outcome(config, [(200, 0.0999, 100, 0.1), (200, 0.1, 100, 0.1), (200, 0.9001, 100, 0.1)])
    assert reasons == ["expected_count_low", "", "expected_count_low"]
    assert severity == [2, 0, 2]


def test_expected_count_rule_on_sample_n_and_caution(tmp_path):
    settings = demo_settings()
    settings["reliability"].update(expected_basis="sample", on_normal_approx_failure="caution")
    config = load_config(write_config(tmp_path / "c.yaml", settings))
    # effective n would fail (50·0.1 = 5) but the sample n basis passes (200·0.1 = 20)
    severity, reasons = outcome(config, [(200, 0.1, 50, 0.1), (60, 0.1, 60, 0.1)])
    assert reasons == ["", "expected_count_low"] and severity == [0, 1]


def test_cv_thresholds(config):
    severity, reasons = outcome(config, [(1000, 0.5, 1000, 0.2999), (1000, 0.5, 1000, 0.30),
                                         (1000, 0.5, 1000, 0.4999), (1000, 0.5, 1000, 0.50)])
    assert reasons == ["", "cv_high", "cv_high", "cv_too_high"]
    assert severity == [0, 1, 1, 2]


def test_no_sample_and_zero_estimate(config):
    # no sample: nothing to estimate. p̂ = 0 has no CV; the expected-count rule judges it.
    severity, reasons = outcome(config, [(0, np.nan, np.nan, np.nan), (500, 0.0, 500, np.nan)])
    assert reasons == ["no_sample", "expected_count_low"] and severity == [2, 2]


def test_reasons_accumulate(config):
    severity, reasons = outcome(config, [(20, 0.05, 20, 0.6)])
    assert reasons == ["sample_too_small;expected_count_low;cv_too_high"] and severity == [2]


# --- NCHS standard (Parker et al. 2017, NCHS Data Presentation Standards for Proportions,
#     Vital Health Stat 2(175)) -------------------------------------------------------------------


@pytest.fixture(scope="module")
def nchs(tmp_path_factory):
    settings = demo_settings()
    settings["reliability"] = {"standard": "nchs_2017"}
    settings["estimation"].update(interval="korn_graubard", confidence=0.95)
    return load_config(write_config(tmp_path_factory.mktemp("nchs") / "c.yaml", settings))


def nchs_outcome(config, rows):
    f = pd.DataFrame(rows, columns=["sample_size", "estimate", "effective_n", "ci_lower", "ci_upper",
                                    "degrees_of_freedom"])
    f["cv"] = 0.1
    _, severity, reasons = assess(f, config)
    return severity.tolist(), [";".join(r) for r in reasons]


def test_nchs_effective_sample_size(nchs):
    # effective n 29 < 30 withheld; 30 presented (the standard's threshold)
    severity, reasons = nchs_outcome(nchs, [(100, 0.5, 29, 0.45, 0.55, 50), (100, 0.5, 30, 0.45, 0.55, 50)])
    assert reasons == ["effective_n_too_small", ""] and severity == [2, 0]


def test_nchs_interval_width_rules(nchs):
    rows = [
        (500, 0.5, 500, 0.35, 0.65, 50),    # absolute width 0.30: withheld
        (500, 0.5, 500, 0.36, 0.64, 50),    # 0.28 wide, relative 56%: presented
        (500, 0.10, 500, 0.03, 0.17, 50),   # 0.14 wide, relative 140% > 130%: withheld
        (500, 0.10, 500, 0.04, 0.16, 50),   # 0.12 wide, relative 120%: presented
        (500, 0.02, 500, 0.005, 0.045, 50),  # 0.04 wide (<= 5 points): presented whatever the relative width
    ]
    severity, reasons = nchs_outcome(nchs, rows)
    assert reasons == ["ci_too_wide", "", "ci_too_wide", "", ""]


def test_nchs_review_flags(nchs):
    rows = [(500, 0.5, 500, 0.45, 0.55, 7), (500, 0.5, 500, 0.45, 0.55, 8), (500, 0.0, 500, 0.0, 0.007, 50)]
    severity, reasons = nchs_outcome(nchs, rows)
    assert reasons == ["df_low", "", "estimate_at_boundary"] and severity == [1, 0, 1]


def test_nchs_needs_korn_graubard_95(tmp_path):
    settings = demo_settings()
    settings["reliability"] = {"standard": "nchs_2017"}
    from pipeline.errors import ConfigError

    with pytest.raises(ConfigError, match="korn_graubard"):
        load_config(write_config(tmp_path / "c.yaml", settings))
