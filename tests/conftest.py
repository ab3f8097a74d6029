"""Shared fixtures: a small fictional demo survey written once per test session, and a helper
that writes a config pointing at any input."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
import yaml

ROOT = Path(__file__).resolve().parents[1]
DEMO_CONFIG = ROOT / "configs" / "demo.yaml"
SMALL_DEMO_PERSONS = 3_000


@pytest.fixture(scope="session")
def small_demo(tmp_path_factory) -> Path:
    """A small demo survey (Parquet and CSV) in a session temp folder: data/raw/ beside configs/."""
    from pipeline.demo import write_demo

    root = tmp_path_factory.mktemp("demo")
    write_demo(root / "data" / "raw", persons=SMALL_DEMO_PERSONS, seed=7, formats=("parquet", "csv"))
    return root


def demo_settings() -> dict:
    return yaml.safe_load(DEMO_CONFIG.read_text())


@pytest.fixture
def project(tmp_path, small_demo) -> Path:
    """A fresh project folder per test: configs/demo.yaml and a copy of the small demo inputs."""
    shutil.copytree(small_demo / "data", tmp_path / "data")
    (tmp_path / "configs").mkdir()
    write_config(tmp_path / "configs" / "demo.yaml", demo_settings())
    return tmp_path


def write_config(path: Path, settings: dict) -> Path:
    path.write_text(yaml.safe_dump(settings, sort_keys=False))
    return path
