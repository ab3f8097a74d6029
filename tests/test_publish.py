"""Publish: the files of a release, written deterministically, with a manifest whose checksums
match the files (sha256 from hashlib, the reference implementation)."""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pandas as pd
import pytest

from pipeline.errors import PublishError
from pipeline.stages.publish import write_release, write_text_atomically


def release_inputs():
    public = pd.DataFrame({"indicator": ["a", "a"], "estimate": [0.25, np.nan], "status": ["published", "suppressed"]})
    cells = public.assign(sample_size=[40, 3])
    rejects = pd.DataFrame({"source_file": ["f.csv"], "row_number": [7], "record_id": ["9"], "column": ["age"],
                            "rule": ["out_of_range"], "value": ["140"]})
    return dict(public=public, cells=cells, rejects=rejects, metadata={"title": "t", "ä": "unicode"},
                manifest={"release_id": "r1"}, formats=["parquet", "csv"])


def test_files_and_manifest(tmp_path):
    manifest = write_release(tmp_path / "r1", **release_inputs())
    root = tmp_path / "r1"
    for path in ("public/estimates.parquet", "public/estimates.csv", "public/metadata.json",
                 "internal/cells.parquet", "internal/rejects.parquet", "manifest.json"):
        assert (root / path).is_file(), path
    on_disk = json.loads((root / "manifest.json").read_text())
    assert on_disk == manifest
    for entry in manifest["outputs"]:
        assert entry["sha256"] == hashlib.sha256((root / entry["path"]).read_bytes()).hexdigest()
    # a missing figure is an empty CSV field
    assert (root / "public/estimates.csv").read_text().splitlines()[2] == "a,,suppressed"
    assert pd.read_parquet(root / "public/estimates.parquet")["estimate"].isna().tolist() == [False, True]


def test_no_rejects_file_without_rejects(tmp_path):
    inputs = release_inputs()
    inputs["rejects"] = inputs["rejects"].iloc[0:0]
    write_release(tmp_path / "r1", **inputs)
    assert not (tmp_path / "r1" / "internal" / "rejects.parquet").exists()


def test_same_content_same_bytes(tmp_path):
    write_release(tmp_path / "a", **release_inputs())
    write_release(tmp_path / "b", **release_inputs())
    for path in ("public/estimates.parquet", "public/estimates.csv", "public/metadata.json", "internal/cells.parquet"):
        assert (tmp_path / "a" / path).read_bytes() == (tmp_path / "b" / path).read_bytes(), path


def test_existing_staging_folder_is_an_error(tmp_path):
    (tmp_path / "r1" / "public").mkdir(parents=True)
    with pytest.raises(PublishError, match="cannot write"):
        write_release(tmp_path / "r1", **release_inputs())


def test_text_replaced_atomically(tmp_path):
    target = tmp_path / "latest"
    write_text_atomically(target, "one\n")
    write_text_atomically(target, "two\n")
    assert target.read_text() == "two\n"
    assert [p.name for p in tmp_path.iterdir()] == ["latest"]  # no temporary file left behind
