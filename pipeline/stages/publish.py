"""Publish: write a release folder. The only stage that writes files; it writes what it is given.

Everything goes into a staging folder first; `runner` renames it into place only when complete.
Data files are written deterministically (no timestamps, fixed column order, no index), so the
same inputs and config give byte-identical data files.
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import pandas as pd
import pyarrow as arrow
import pyarrow.parquet as pq

from pipeline.errors import PublishError

def write_release(staging: Path, *, public: pd.DataFrame, cells: pd.DataFrame, rejects: pd.DataFrame,
                  metadata: dict, manifest: dict, formats: list[str]) -> dict:
    """Write every file of a release into `staging`; return the completed manifest."""
    try:
        (staging / "public").mkdir(parents=True)
        (staging / "internal").mkdir()
        outputs = []
        if "parquet" in formats:
            outputs.append(_write_parquet(public, staging / "public" / "estimates.parquet"))
        if "csv" in formats:
            outputs.append(_write_csv(public, staging / "public" / "estimates.csv"))
        outputs.append(_write_json(metadata, staging / "public" / "metadata.json"))
        outputs.append(_write_parquet(cells, staging / "internal" / "cells.parquet"))
        if len(rejects):
            outputs.append(_write_parquet(rejects, staging / "internal" / "rejects.parquet"))
        manifest = dict(manifest)
        manifest["outputs"] = [_describe(path, staging) for path in outputs]
        _write_json(manifest, staging / "manifest.json")
        return manifest
    except OSError as exc:
        raise PublishError(f"publish: cannot write {exc.filename or staging}: {exc.strerror or exc}") from None


def _write_parquet(frame: pd.DataFrame, path: Path) -> Path:
    table = arrow.Table.from_pandas(frame, preserve_index=False)
    pq.write_table(table, path, compression="zstd")
    return path


def _write_csv(frame: pd.DataFrame, path: Path) -> Path:
    # empty fields for missing figures; '\n' line ends on every platform
    frame.to_csv(path, index=False, lineterminator="\n", na_rep="")
    return path


def _write_json(payload: dict, path: Path) -> Path:
    path.write_text(json.dumps(payload, indent=2, ensure_ascii=False, default=str) + "\n", encoding="utf-8")
    return path


def _describe(path: Path, root: Path) -> dict:
    digest = hashlib.sha256(path.read_bytes()).hexdigest()
    return {"path": str(path.relative_to(root)), "sha256": digest, "bytes": path.stat().st_size}


def write_text_atomically(path: Path, text: str) -> None:
    """Write via a temporary file and an atomic rename, so readers see the old or the new text."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    with open(tmp, "w", encoding="utf-8") as fh:
        fh.write(text)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
