"""The protect floor measurement (tests/benchmarks/protect_floor.py): it runs, it restores what it
replaces, and it writes nothing into the config's output folder. Its figures are measurements, not
checks: only an order that holds by a wide margin is asserted (with complementary suppression off
the stage solves no program: 0.02 s against about 1 s audited on the demo)."""

from __future__ import annotations

from pipeline.methods import suppression
from tests.benchmarks import protect_floor


def test_floor_runs_three_ways_restores_the_audit_and_leaves_the_output_folder_alone(project, capsys):
    audit, ranges = suppression.audit_quantity, suppression._with_ranges
    medians = protect_floor.main([str(project / "configs" / "demo.yaml"), "--repeats", "1"])
    assert set(medians) == set(protect_floor.MODES)
    assert suppression.audit_quantity is audit and suppression._with_ranges is ranges
    assert not (project / "data" / "out").exists()
    printed = capsys.readouterr().out
    assert all(mode in printed for mode in protect_floor.MODES)
    # with complementary suppression off the stage solves no program at all
    assert medians["no complementary suppression"][0] < medians["audited"][0]
