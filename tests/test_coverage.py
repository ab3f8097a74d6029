"""Tests for pipeline.coverage: a small study (8 samples of about 3,000 persons, one worker).

No threshold is put on the coverage itself: 8 samples are far too few to judge it. What is checked:
* the table holds every variance × interval × subset × band, with shares that are proportions;
* the harness's counts for one sample equal what the real release path gives for that sample:
  `runner.run` on files written for it, the demo's truth table joined with pandas, bands cut with
  pandas, covered recomputed as ci_lower <= truth <= ci_upper (an independent recomputation of
  every step the harness does in memory);
* the Monte Carlo standard error against the textbook standard error of a mean of independent
  sample-level outcomes (statistics.stdev / √S) in the case where the two must agree;
* the outputs are written, and what was not run is said.
"""

from __future__ import annotations

import json
import math
import statistics

import numpy as np
import pandas as pd
import pytest
import yaml

from pipeline import coverage, runner
from pipeline.coverage import BANDS, INTERVAL_METHODS, SUBSETS, run_coverage
from pipeline.demo import build_population, draw_survey, generate_demo


SAMPLES = 8
PERSONS = 3_000
SEED = coverage.DEFAULT_SEED
BAND_LABELS = [b[0] for b in BANDS]


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    return run_coverage(samples=SAMPLES, persons=PERSONS, seed=SEED, workers=1,
                        out_dir=tmp_path_factory.mktemp("coverage"))


@pytest.fixture(scope="module")
def population():
    return build_population(SEED)


def test_every_combination_is_present(study):
    t = study.table
    assert {"simple_random", "kish", "replicate"} <= set(study.variance_methods)
    # linearization is either run or reported as not run, with the reason
    assert ("linearization" in study.variance_methods) != ("linearization" in study.unavailable)
    expected = {(v, i, s, b) for v in study.variance_methods for i in INTERVAL_METHODS
                for s in SUBSETS for b in BAND_LABELS + ["all"]}
    keys = list(t[["variance", "interval", "subset", "band"]].itertuples(index=False, name=None))
    assert len(keys) == len(set(keys)) == len(expected)
    assert set(keys) == expected
    assert set(t.loc[t["interval"] == "korn_graubard", "rules"]) == {"nchs_2017"}
    assert set(t.loc[t["interval"] != "korn_graubard", "rules"]) == {"custom"}


def test_shares_are_proportions_and_bands_add_up(study):
    t = study.table
    has = t["cell_samples"] > 0
    assert has.any()
    shares = t.loc[has, ["covered_share", "miss_truth_below", "miss_truth_above"]]
    assert ((shares >= 0) & (shares <= 1)).all().all()
    np.testing.assert_allclose(shares.sum(axis=1), 1.0, rtol=1e-12)
    assert t.loc[~has, "covered_share"].isna().all()
    assert (t.loc[has, "mc_se"] >= 0).all()
    # the "all" band is the sum of the bands; published cells are a subset of all cells
    key = ["variance", "interval", "subset"]
    by_band = t[t["band"] != "all"].groupby(key)["cell_samples"].sum()
    overall = t[t["band"] == "all"].set_index(key)["cell_samples"]
    assert by_band.sort_index().equals(overall.sort_index())
    pub = overall.xs("published", level="subset")
    assert (pub <= overall.xs("all", level="subset")).all()
    # per-sample counts hold the table's totals
    assert study.per_sample.shape == (SAMPLES, len(study.variance_methods), len(INTERVAL_METHODS),
                                      len(BANDS), len(SUBSETS), 3)
    assert int(study.per_sample[..., 0].sum()) == int(t.loc[t["band"] != "all", "cell_samples"].sum())


def _release_counts(tmp_path, population, microdata, variance: str, interval: str) -> np.ndarray:
    """(bands, subsets, [cells, covered, truth below]) from a real release of `microdata`."""
    root = tmp_path / f"{variance}-{interval}"
    raw = root / "data" / "raw"
    raw.mkdir(parents=True)
    microdata.to_parquet(raw / "demo_persons.parquet", index=False)
    population.areas.to_csv(raw / "demo_areas.csv", index=False)
    settings = yaml.safe_load(coverage.DEMO_CONFIG.read_text())
    settings["disclosure"]["complementary"] = False  # as the study does: it judges reliability rules
    if variance == "linearization":
        settings["design"] = yaml.safe_load(coverage.LINEARIZATION_CONFIG.read_text())["design"]
    elif variance == "replicate":
        pass  # the demo config's own design
    else:
        settings["design"] = {"weight": "wt", "variance": variance}
    settings["estimation"]["interval"] = interval
    if interval == "korn_graubard":
        settings["reliability"]["standard"] = "nchs_2017"
    config = root / "configs" / "demo.yaml"
    config.parent.mkdir()
    config.write_text(yaml.safe_dump(settings, sort_keys=False))
    summary = runner.run(config, release_id="coverage-check")
    assert summary.rows_rejected == 0
    cells = pd.read_parquet(summary.release_dir / "internal" / "cells.parquet")

    keys = ["indicator", "geo_level", "geo_code", "sex", "age_group"]
    joined = cells.merge(population.truth[keys + ["true_proportion"]], on=keys, how="left",
                         validate="one_to_one")
    assert len(joined) == len(cells)
    truth = joined["true_proportion"]
    usable = truth.notna() & joined["ci_lower"].notna() & joined["ci_upper"].notna()
    covered = usable & (joined["ci_lower"] <= truth) & (truth <= joined["ci_upper"])
    below = usable & (truth < joined["ci_lower"])
    published = joined["status"] != "suppressed"
    band = pd.cut(joined["effective_n"].round(6), [b[1] for b in BANDS] + [math.inf], right=False,
                  labels=BAND_LABELS)
    out = np.zeros((len(BANDS), len(SUBSETS), 3), dtype=np.int64)
    for j, subset in enumerate((usable, usable & published)):
        for k, flag in enumerate((subset, subset & covered, subset & below)):
            out[:, j, k] = flag.groupby(band, observed=False).sum().reindex(BAND_LABELS).to_numpy()
    return out


def test_counts_equal_those_of_a_real_release_of_one_sample(study, population, tmp_path):
    microdata = draw_survey(population, seed=study.sample_seeds[0], persons=PERSONS)
    combos = [("replicate", "wilson"), ("replicate", "korn_graubard"), ("simple_random", "wald"),
              ("kish", "clopper_pearson")]
    if "linearization" in study.variance_methods:
        combos += [("linearization", "jeffreys"), ("linearization", "korn_graubard")]
    for variance, interval in combos:
        expected = _release_counts(tmp_path, population, microdata, variance, interval)
        got = study.per_sample[0, study.variance_methods.index(variance), INTERVAL_METHODS.index(interval)]
        assert expected[:, 0, 0].sum() > 1000  # a real comparison, not of empty tables
        np.testing.assert_array_equal(got, expected, err_msg=f"{variance} / {interval}")


def test_draw_survey_with_the_population_seed_is_the_demo_sample(population):
    again = generate_demo(persons=PERSONS, seed=SEED)
    pd.testing.assert_frame_equal(draw_survey(population, seed=SEED, persons=PERSONS), again.microdata)
    pd.testing.assert_frame_equal(population.truth, again.truth)
    other = draw_survey(population, seed=coverage.sample_seed(SEED, 0), persons=PERSONS)
    assert not other["person_id"].equals(again.microdata["person_id"])


def test_mc_standard_error_is_between_samples():
    # When every cell of a sample is covered or every one is missed (perfect correlation within a
    # sample), each sample is one independent 0/1 outcome and the standard error of the covered
    # share is the usual one of a mean: statistics.stdev(outcomes) / √S. The binomial figure that
    # treats the cells as independent is far smaller, which is why it is not used.
    outcomes = [1, 1, 0, 1, 1, 1, 0, 1, 1, 1]
    cells = 40
    counts = np.zeros((len(outcomes), 3), dtype=np.int64)
    counts[:, 0] = cells
    counts[:, 1] = np.array(outcomes) * cells
    share, mc_se, binomial = coverage._share_and_se(counts)
    assert share == pytest.approx(statistics.mean(outcomes), rel=1e-15)
    assert mc_se == pytest.approx(statistics.stdev(outcomes) / math.sqrt(len(outcomes)), rel=1e-12)
    assert binomial < mc_se / 5


def test_outputs_are_written(study):
    files = study.files
    for key in ("csv", "by_effective_n", "png", "summary", "json"):
        assert files[key].is_file(), key
    assert files["png"].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    table = pd.read_csv(files["csv"])
    assert len(table) == len(study.table)
    assert list(table.columns) == list(study.table.columns)
    params = json.loads(files["json"].read_text())
    assert params["samples"] == SAMPLES and params["persons"] == PERSONS and params["seed"] == SEED
    assert params["runtime_seconds"] > 0
    assert params["unavailable"] == study.unavailable
    summary = files["summary"].read_text()
    for method in coverage.HEADLINE_METHODS:
        assert method in summary
    for name in study.unavailable:
        assert f"{name!r} was not run" in summary


def test_bad_arguments_are_refused(tmp_path):
    with pytest.raises(ValueError, match=r"samples \(1\) must be an integer >= 2"):
        run_coverage(samples=1, out_dir=tmp_path)
    with pytest.raises(ValueError, match=r"workers \(0\)"):
        run_coverage(samples=4, workers=0, out_dir=tmp_path)
    assert not list(tmp_path.iterdir())  # refused before anything is written
