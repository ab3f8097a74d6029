"""End to end on real open data carried by a package: statsmodels.datasets.star98.

The dataset gives, for 303 school districts, the number of pupils above (NABOVE) and below
(NBELOW) the national median in mathematics. Expanded to one record per pupil with equal weights
and `simple_random` variance, ratebook's published proportion and interval for every district
must equal statsmodels' `proportion_confint` on the same counts — an outside reference for the
whole chain (ingest, derive, aggregate, estimate, publish).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from statsmodels.datasets import star98
from statsmodels.stats.proportion import proportion_confint

from pipeline.runner import run
from tests.conftest import write_config

# ratebook interval name -> statsmodels method name
METHODS = {"wilson": "wilson", "clopper_pearson": "beta", "wald": "normal"}


@pytest.fixture(scope="module")
def star98_inputs(tmp_path_factory):
    counts = star98.load_pandas().endog.astype(int)
    counts["district"] = [f"d{i:03d}" for i in range(1, len(counts) + 1)]
    root = tmp_path_factory.mktemp("star98")
    (root / "data").mkdir()
    pupils = counts.loc[counts.index.repeat(counts["NABOVE"] + counts["NBELOW"]), ["district"]].reset_index(drop=True)
    above = np.concatenate([np.r_[np.ones(a, dtype=int), np.zeros(b, dtype=int)]
                            for a, b in zip(counts["NABOVE"], counts["NBELOW"])])
    pupils["above_median"] = above
    pupils["pupil_id"] = np.arange(1, len(pupils) + 1)
    pupils["weight"] = 1.0
    pupils.to_parquet(root / "data" / "pupils.parquet", index=False)
    lookup = pd.DataFrame({"state_code": "S", "state_name": "All districts",
                           "district_code": counts["district"], "district_name": counts["district"]})
    lookup.to_csv(root / "data" / "districts.csv", index=False)
    return root, counts


def star98_config(root, interval: str) -> dict:
    return {
        "release": {"name": "star98", "title": "Pupils above the national median", "publisher": "test"},
        "source": {"path": "data/pupils.parquet", "record_id": "pupil_id",
                   "variables": {"above_median": {"type": "integer", "values": [0, 1]}}},
        "geography": {"lookup": "data/districts.csv", "key": "district",
                      "levels": [{"level": "state", "code": "state_code", "name": "state_name"},
                                 {"level": "district", "code": "district_code", "name": "district_name"}]},
        "design": {"weight": "weight", "variance": "simple_random"},
        "tables": [{"by": []}],
        "indicators": {"above_median": {"label": "Pupils above the national median in mathematics",
                                        "condition": "above_median == 1"}},
        "estimation": {"interval": interval, "confidence": 0.95, "margin_confidence": 0.95},
        # no reliability or disclosure rule may withhold a district here: the check is the arithmetic
        "reliability": {"min_sample": 0, "min_expected": 0, "cv_caution": 1e9, "cv_suppress": 1e9},
        "disclosure": {"min_respondents": 0, "round_counts_to": 0, "decimals": None},
        "output": {"dir": "out", "formats": ["parquet", "csv"]},
    }


@pytest.mark.parametrize("interval", sorted(METHODS))
def test_every_district_matches_statsmodels(star98_inputs, interval):
    root, counts = star98_inputs
    config = write_config(root / f"star98_{interval}.yaml", star98_config(root, interval))
    summary = run(config, release_id=f"star98-{interval}")
    assert summary.rows_read == int((counts["NABOVE"] + counts["NBELOW"]).sum())
    published = pd.read_parquet(summary.release_dir / "public" / "estimates.parquet")
    districts = published[published["geo_level"] == "district"].set_index("geo_code").loc[counts["district"]]
    assert (districts["status"] == "published").all()

    n = (counts["NABOVE"] + counts["NBELOW"]).to_numpy()
    x = counts["NABOVE"].to_numpy()
    lower, upper = proportion_confint(x, n, alpha=0.05, method=METHODS[interval])
    # statsmodels leaves Wald unclipped; ratebook clips to [0, 1] (stated in metadata)
    lower, upper = np.clip(lower, 0, 1), np.clip(upper, 0, 1)
    # tolerance: float sums of 0/1 weights are exact; the intervals differ only by rounding
    # of the quantile functions (1e-9 covers scipy's root-finding tolerance for the exact interval)
    np.testing.assert_allclose(districts["estimate"], x / n, rtol=0, atol=1e-12)
    np.testing.assert_allclose(districts["ci_lower"], lower, rtol=0, atol=1e-9)
    np.testing.assert_allclose(districts["ci_upper"], upper, rtol=0, atol=1e-9)
    np.testing.assert_allclose(districts["std_error"], np.sqrt(x / n * (1 - x / n) / n), rtol=1e-12)
    np.testing.assert_array_equal(districts["sample_size"], n)
    # equal weights and simple random sampling: design effect 1, effective n = n
    np.testing.assert_allclose(districts["effective_n"], n, rtol=1e-12)

    state = published[published["geo_level"] == "state"].iloc[0]
    assert state["estimate"] == pytest.approx(x.sum() / n.sum(), abs=1e-12)


def test_star98_csv_equals_parquet(star98_inputs):
    root, _ = star98_inputs
    config = write_config(root / "star98_csv.yaml", star98_config(root, "wilson"))
    summary = run(config, release_id="star98-csv")
    from_parquet = pd.read_parquet(summary.release_dir / "public" / "estimates.parquet")
    from_csv = pd.read_csv(summary.release_dir / "public" / "estimates.csv", keep_default_na=False,
                           na_values=[""], dtype={"reasons": str, "note": str})
    for col in ("estimate", "ci_lower", "ci_upper", "std_error"):
        # CSV holds the shortest repr of each float, which reads back exactly
        np.testing.assert_array_equal(from_csv[col].to_numpy(), from_parquet[col].to_numpy())
