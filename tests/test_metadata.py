"""metadata.json explains every public column, every code, the methods and the cautions that the
product promises (README 'Cautions'; DESIGN §3)."""

from __future__ import annotations

import json

from pipeline.config import load_config
from pipeline.flags import Reason, Status
from pipeline.metadata import build_metadata
from pipeline.stages.ingest import RejectReason
from pipeline.stages.protect import public_columns
from tests.conftest import DEMO_CONFIG


def test_every_column_code_and_method_is_explained():
    config = load_config(DEMO_CONFIG)
    meta = build_metadata(config, ["sex", "age_group"])
    assert set(meta["columns"]) == set(public_columns(["sex", "age_group"]))
    assert set(meta["reason_codes"]) == {r.value for r in Reason}
    assert set(meta["status_codes"]) == {s.value for s in Status}
    assert set(meta["reject_codes"]) == {r.value for r in RejectReason}
    assert "wilson" in meta["method"]["interval"]["name"]
    assert "Fay" in meta["method"]["variance"]  # successive difference, Fay & Train 1995
    assert set(meta["indicators"]) == set(config.indicators)
    # every selectable method is listed with its formula and source
    from pipeline.methods.intervals import IntervalMethod
    from pipeline.methods.variance import ReplicateMethod

    assert set(meta["method"]["available_intervals"]) == {m.value for m in IntervalMethod}
    assert set(meta["method"]["available_replicate_methods"]) == {m.value for m in ReplicateMethod}
    assert all("19" in text or "20" in text for text in meta["method"]["available_intervals"].values())
    assert meta["thresholds"]["reliability"]["min_sample"] == 30
    json.dumps(meta)  # serialisable as it stands


def test_cautions_say_what_the_flags_mean_and_defer_to_local_rules():
    meta = build_metadata(load_config(DEMO_CONFIG), ["sex", "age_group"])
    text = " ".join(meta["cautions"]).lower()
    assert "caution" in text and "suppressed" in text
    assert "defaults" in text and "own quality standards" in text
    assert "local law" in text
    # complementary suppression is on in the demo: the cautions say what it does and that the
    # office's rules decide; switched off, they say it is not applied
    assert "complementary" in text and "audit" in text and "protection level" in text
    assert "complementary suppression is not applied" not in text
