"""How small the protect stage can get: one config run three ways, a few times each, protect's
seconds against the whole run's (medians):

    python -m tests.benchmarks.protect_floor [CONFIG] [--repeats 3]

* audited: the release as `ratebook run` makes it;
* optimisation only: every audit replaced by one that proves every cell, so that each table is
  one solve of the mixed-integer program and no linear program runs. A measurement only: such a
  release is not audited;
* no complementary suppression (`disclosure.complementary: false`): primary suppression alone.

Every release goes to a temporary folder that is deleted; the config's output folder is not
touched. The gap between the last two is what choosing complementary cells by optimisation costs
before anything is proven: on the demo it is a third of a run (README, Performance).
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
from pathlib import Path

import numpy as np

MODES = ("audited", "optimisation only", "no complementary suppression")


def _proves_everything(table, quantity, hidden, *, witnesses=None, seed=0):
    """Stands in for `suppression.audit_quantity`: every cell proven, no cut, no range."""
    from pipeline.methods import suppression

    n = table.n_cells
    nan = np.full(n, np.nan)
    return suppression.QuantityAudit(name=quantity.name, lower=nan, upper=nan, outer_lower=nan, outer_upper=nan,
                                     exact=np.zeros(n, dtype=bool), required=quantity.required,
                                     ok=np.ones(n, dtype=bool)), []


def measure(config_path: str | Path, mode: str, repeats: int) -> list[tuple[float, float]]:
    """(protect seconds, run seconds) of `repeats` runs of the config in one of MODES."""
    from pipeline import runner
    from pipeline.methods import suppression

    if mode not in MODES:
        raise ValueError(f"mode {mode!r}: choose one of {MODES}")
    load, audit, ranges = runner.load_config, suppression.audit_quantity, suppression._with_ranges
    with tempfile.TemporaryDirectory(prefix="ratebook-floor-") as out:
        def load_here(path):
            config = load(path)
            config.output_dir = Path(out)
            if mode == MODES[2]:
                off = config.settings.disclosure.model_copy(update={"complementary": False})
                config.settings = config.settings.model_copy(update={"disclosure": off})
            return config

        runner.load_config = load_here
        if mode == MODES[1]:
            suppression.audit_quantity = _proves_everything
            suppression._with_ranges = lambda table, q, hidden, audit, witnesses: audit
        try:
            summaries = [runner.run(config_path, release_id=f"floor-{i}", replace=True) for i in range(repeats)]
        finally:
            runner.load_config, suppression.audit_quantity, suppression._with_ranges = load, audit, ranges
    return [(s.stage_seconds["protect"], s.seconds) for s in summaries]


def main(argv: list[str] | None = None) -> dict[str, tuple[float, float]]:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("config", nargs="?", default="configs/demo.yaml")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args(argv)
    medians = {}
    print(f"{'mode':30s} {'protect s':>10s} {'run s':>8s} {'share':>7s}   (medians of {args.repeats})")
    for mode in MODES:
        runs = measure(args.config, mode, args.repeats)
        protect, run = (statistics.median(v) for v in zip(*runs))
        medians[mode] = (protect, run)
        print(f"{mode:30s} {protect:10.3f} {run:8.2f} {protect / run:7.0%}")
    return medians


if __name__ == "__main__":
    main()
