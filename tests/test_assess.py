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
