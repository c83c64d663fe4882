"""Flow definitions: the embedded default loads, and every mistake names its key."""

from __future__ import annotations

import pytest
import yaml

from thresher.flows.config import ConfigError, build_definition, default_config_text, load_definition


def _default() -> dict:
    return yaml.safe_load(default_config_text())


def _at(data: dict, name: str) -> int:
    """Position of a step in the chain (tests must not assume the chain's length)."""
    return next(i for i, s in enumerate(data["steps"]) if s["step"] == name)


def test_embedded_default_has_the_whole_chain_in_order():
    d = load_definition()
    names = [s.name for s in d.steps]
    order = ["extract", "clean", "language", "split", "dedup", "tokens"]
    assert [n for n in names if n in order] == order
    assert d.model.schedule.cron == "0 3 * * 1"
    assert d.step("split").params.encoding == "cl100k_base"


def test_misspelt_top_level_key_names_it_and_the_allowed_keys():
    data = _default()
    data["stroe"] = data.pop("store")
    with pytest.raises(ConfigError) as e:
        build_definition(data, "flow.yaml")
    msg = str(e.value)
    assert "flow.yaml: stroe: unknown key" in msg
    allowed = msg.split("allowed", 1)[1] if "allowed" in msg else msg
    for key in ("name", "source", "store", "runner", "schedule", "deliver", "probes", "housekeeping", "steps"):
        assert key in allowed, key


def test_misspelt_step_parameter_lists_that_steps_parameters():
    data = _default()
    i = _at(data, "split")
    data["steps"][i]["params"] = {"max_tokns": 200}
    with pytest.raises(ConfigError) as e:
        build_definition(data, "flow.yaml")
    assert f"steps[{i}].params.max_tokns: unknown key" in str(e.value)
    assert "max_tokens" in str(e.value) and "overlap_tokens" in str(e.value)


def test_bad_value_names_the_key_and_the_allowed_values():
    data = _default()
    data["runner"]["kind"] = "gpu"
    with pytest.raises(ConfigError) as e:
        build_definition(data, "flow.yaml")
    assert "runner.kind" in str(e.value)
    assert "'sequential', 'threads', 'processes' or 'dask'" in str(e.value)


def test_bad_step_parameter_value_is_reported_with_its_path():
    data = _default()
    i = _at(data, "clean")
    data["steps"][i]["params"] = {"normalization": "NFKX"}
    with pytest.raises(ConfigError, match=rf"steps\[{i}\]\.params\.normalization"):
        build_definition(data, "flow.yaml")


def test_unknown_step_lists_the_built_in_steps():
    data = _default()
    i = _at(data, "language")
    data["steps"][i] = {"step": "langauge"}
    with pytest.raises(ConfigError) as e:
        build_definition(data, "flow.yaml")
    assert f"steps[{i}].step: unknown step 'langauge'" in str(e.value)
    assert "built-in steps are extract, " in str(e.value) and "tokens" in str(e.value)


def test_bad_cron_and_time_zone_are_explained():
    data = _default()
    data["schedule"] = {"cron": "every monday", "timezone": "Mars/Olympus"}
    with pytest.raises(ConfigError) as e:
        build_definition(data, "flow.yaml")
    assert "schedule.cron: a cron expression has 5 fields" in str(e.value)
    assert "schedule.timezone: unknown time zone 'Mars/Olympus'" in str(e.value)


def test_chain_order_is_checked():
    data = _default()
    data["steps"] = [{"step": "extract"}, {"step": "split"}, {"step": "clean"}]
    with pytest.raises(ConfigError, match=r"steps\[2\] \(clean\): takes pages but the step before it gives chunks"):
        build_definition(data, "flow.yaml")


def test_a_step_can_be_dropped():
    data = _default()
    data["steps"] = [s for s in data["steps"] if s["step"] != "language"]
    d = build_definition(data)
    assert "language" not in [s.name for s in d.steps]


def test_own_step_by_dotted_path_and_its_parameters_are_validated():
    data = _default()
    i = _at(data, "clean")
    data["steps"].insert(i, {"step": "example_steps:MASK_EMAILS", "params": {"replacement": "<hidden>"}})
    d = build_definition(data)
    assert d.steps[i].name == "mask_emails" and d.steps[i].params.replacement == "<hidden>"
    data["steps"][i]["params"] = {"replace": "x"}
    with pytest.raises(ConfigError, match=rf"steps\[{i}\]\.params\.replace: unknown key; allowed keys here: replacement"):
        build_definition(data)


def test_dotted_path_that_does_not_import_says_so():
    data = _default()
    data["steps"].insert(1, {"step": "no_such_module:STEP"})
    with pytest.raises(ConfigError, match="cannot import module 'no_such_module'"):
        build_definition(data)


def test_parameter_change_changes_digests_from_that_step_on_only():
    a = build_definition(_default())
    data = _default()
    i = _at(data, "split")
    data["steps"][i]["params"]["max_tokens"] = 200
    b = build_definition(data)
    same = [x.digest == y.digest for x, y in zip(a.steps, b.steps)]
    assert same == [True] * i + [False] * (len(same) - i)


def test_missing_file_and_bad_yaml(tmp_path):
    with pytest.raises(ConfigError, match="flow definition not found"):
        load_definition(tmp_path / "nope.yaml")
    p = tmp_path / "bad.yaml"
    p.write_text("steps: [extract\n")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_definition(p)
