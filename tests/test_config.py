"""Config loading: every problem reported at once, with key path, value, what is allowed and a
close match. The contract keys are those of DESIGN.md §3."""

from __future__ import annotations

import copy

import pytest

from pipeline.config import load_config
from pipeline.errors import ConfigError
from tests.conftest import DEMO_CONFIG, demo_settings, write_config


def load_with(tmp_path, change) -> ConfigError | object:
    settings = copy.deepcopy(demo_settings())
    change(settings)
    path = write_config(tmp_path / "c.yaml", settings)
    return load_config(path)


def problems_of(tmp_path, change) -> str:
    with pytest.raises(ConfigError) as info:
        load_with(tmp_path, change)
    return str(info.value)


def test_demo_config_loads_and_resolves_paths_against_its_folder():
    config = load_config(DEMO_CONFIG)
    assert config.source_path == (DEMO_CONFIG.parent / "../data/raw/demo_persons.parquet").resolve()
    assert config.output_dir == (DEMO_CONFIG.parent / "../data/out").resolve()
    assert config.level_names == ["nation", "region", "district", "area"]
    assert config.replicate_columns[0] == "rw1" and len(config.replicate_columns) == 80
    assert len(config.indicators) >= 6
    assert len(config.sha256) == 64


def test_typo_in_key_names_the_path_and_a_close_match(tmp_path):
    text = problems_of(tmp_path, lambda s: s["estimation"].update(intervall=s["estimation"].pop("interval")))
    assert "estimation.intervall" in text and "did you mean 'interval'?" in text


def test_bad_choice_names_value_allowed_and_close_match(tmp_path):
    text = problems_of(tmp_path, lambda s: s["estimation"].update(interval="wilsen"))
    assert "estimation.interval" in text and "'wilsen'" in text and "did you mean 'wilson'?" in text
    assert "clopper_pearson" in text  # the allowed values are listed


def test_every_problem_is_reported_at_once(tmp_path):
    def change(s):
        s["estimation"]["interval"] = "wilsen"
        s["reliability"]["min_sampel"] = 30
        s["tables"].append({"by": ["sexx"]})
        s["indicators"]["smoker"]["condition"] = "smokr == 1"

    text = problems_of(tmp_path, change)
    for fragment in ("estimation.interval", "reliability.min_sampel", "tables[4].by", "did you mean 'sex'?",
                     "indicators.smoker.condition", "did you mean 'smoker'?"):
        assert fragment in text, fragment


def test_wrong_type_names_path_and_value(tmp_path):
    text = problems_of(tmp_path, lambda s: s["reliability"].update(min_sample="thirty"))
    assert "reliability.min_sample" in text and "'thirty'" in text


def test_expression_that_calls_a_function_is_refused(tmp_path):
    text = problems_of(tmp_path, lambda s: s["indicators"]["smoker"].update(condition="open('/etc/passwd')"))
    assert "indicators.smoker.condition" in text


def test_column_written_twice_is_refused(tmp_path):
    path = tmp_path / "dup.yaml"
    text = DEMO_CONFIG.read_text().replace("    age:", "    sex: {type: integer}\n    age:", 1)
    path.write_text(text)
    with pytest.raises(ConfigError, match="'sex' is written twice"):
        load_config(path)


def test_column_with_two_roles_is_refused(tmp_path):
    text = problems_of(tmp_path, lambda s: s["design"].update(weight="person_id"))
    assert "design.weight" in text and "already used as source.record_id" in text


def test_domain_must_cover_every_declared_value(tmp_path):
    text = problems_of(tmp_path, lambda s: s["domains"]["sex"]["categories"].pop(2))
    assert "domains.sex.categories" in text and "[2]" in text


def test_breaks_must_cover_the_declared_range(tmp_path):
    text = problems_of(tmp_path, lambda s: s["domains"]["age_group"].update(breaks=[0, 15, 35, 65, 100]))
    assert "domains.age_group.breaks" in text


def test_down_to_must_be_a_level(tmp_path):
    text = problems_of(tmp_path, lambda s: s["tables"][3].update(down_to="distrct"))
    assert "tables[3].down_to" in text and "did you mean 'district'?" in text


def test_replicates_required_for_replicate_variance(tmp_path):
    text = problems_of(tmp_path, lambda s: s["design"].pop("replicates"))
    assert "design.replicates" in text


def test_fay_needs_rho(tmp_path):
    text = problems_of(tmp_path, lambda s: s["design"]["replicates"].update(method="fay"))
    assert "design.replicates.fay_rho" in text


def test_complementary_suppression_is_accepted_and_its_settings_checked(tmp_path):
    # complementary suppression is implemented now: true loads; its settings are validated with
    # their key paths like every other key
    config = load_with(tmp_path, lambda s: s["disclosure"].update(complementary=True, cost="cells",
                                                                  protection={"relative": 0.5, "respondents": 5}))
    assert config.disclosure.complementary is True
    assert config.disclosure.protection.respondents == 5
    text = problems_of(tmp_path, lambda s: s["disclosure"].update(cost="cell", protection={"relativ": 0.5},
                                                                  decimals=-1))
    assert "disclosure.cost" in text and "did you mean 'cells'?" in text
    assert "disclosure.protection" in text and "did you mean 'relative'?" in text
    assert "disclosure.decimals" in text


def test_missing_file_and_bad_yaml(tmp_path):
    with pytest.raises(ConfigError, match="cannot read"):
        load_config(tmp_path / "nope.yaml")
    bad = tmp_path / "bad.yaml"
    bad.write_text("release: [unclosed\n")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_config(bad)


def test_stratified_jackknife_needs_multipliers(tmp_path):
    text = problems_of(tmp_path, lambda s: s["design"]["replicates"].update(method="jackknife_stratified"))
    assert "design.replicates.multipliers" in text
