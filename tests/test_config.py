"""Configuration: documented defaults, validation, clear errors."""

from pathlib import Path

import pytest
import yaml

from pipeline.config import SCHEMA, default_config, load_config, validate_config
from pipeline.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]


def test_default_yaml_matches_schema():
    # configs/default.yaml is the documented copy of the defaults; the schema
    # is the source of truth. They must agree key by key.
    data = yaml.safe_load((ROOT / "configs" / "default.yaml").read_text(encoding="utf-8"))
    assert set(data) == set(SCHEMA)
    for sec, keys in SCHEMA.items():
        assert set(data[sec]) == set(keys), sec
        for key, param in keys.items():
            assert data[sec][key] == param.default, f"{sec}.{key}"


def test_default_yaml_loads_to_defaults():
    assert load_config(ROOT / "configs" / "default.yaml") == default_config()


def test_override_merges_and_casts():
    cfg = validate_config({"pruning": {"spur_radius_factor": 2}})
    assert cfg["pruning"]["spur_radius_factor"] == 2.0
    assert isinstance(cfg["pruning"]["spur_radius_factor"], float)
    assert cfg["cleaning"] == default_config()["cleaning"]


@pytest.mark.parametrize(
    "overrides, fragment",
    [
        ({"nosuch": {}}, "unknown section 'nosuch'"),
        ({"pruning": {"nosuch": 1}}, "unknown key 'pruning.nosuch'"),
        ({"pruning": {"spur_radius_factor": -1}}, "pruning.spur_radius_factor"),
        ({"pruning": {"max_rounds": 0}}, "pruning.max_rounds"),
        ({"cleaning": {"fill_cavities": "yes"}}, "cleaning.fill_cavities"),
        ({"radii": {"statistic": "mode"}}, "radii.statistic"),
        ({"cleaning": {"min_object_volume_um3": float("nan")}}, "cleaning.min_object_volume_um3"),
        ({"pruning": {"max_rounds": True}}, "pruning.max_rounds"),
        ({"input": {"implausible_spacing": "ignore"}}, "input.implausible_spacing"),
        ({"input": {"implausible_spacing": True}}, "input.implausible_spacing"),
    ],
)
def test_bad_values_name_the_key(overrides, fragment):
    with pytest.raises(ConfigError, match=fragment.replace(".", r"\.")):
        validate_config(overrides)


@pytest.mark.parametrize("lo, hi", [("ratio_min", "ratio_max"), ("exponent_min", "exponent_max")])
def test_keys_bounding_one_range_are_checked_on_loading(lo, hi, tmp_path):
    # A file whose lower bound exceeds its upper one fails when it is read,
    # not after the thinning and the flow of a whole volume.
    p = tmp_path / "swapped.yaml"
    p.write_text(f"bifurcations:\n  {lo}: 5.0\n  {hi}: 1.5\n", encoding="utf-8")
    with pytest.raises(ConfigError, match=f"'bifurcations.{lo}' and 'bifurcations.{hi}': expected {lo} <= {hi}"):
        load_config(p)
    # either bound may be off
    assert load_config({"bifurcations": {lo: 5.0, hi: None}})["bifurcations"][lo] == 5.0


def test_bad_yaml_file(tmp_path):
    p = tmp_path / "bad.yaml"
    p.write_text("pruning: [unclosed\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_config(p)
    with pytest.raises(ConfigError, match="not found"):
        load_config(tmp_path / "missing.yaml")


@pytest.mark.parametrize("path", sorted((ROOT / "configs").glob("*.yaml")), ids=lambda p: p.name)
def test_every_shipped_config_is_valid_and_explained(path):
    # Presets are validated like any user config, and each says why it
    # departs from the defaults: every preset key sits under a comment.
    cfg = load_config(path)
    assert set(cfg) == set(default_config())
    text = path.read_text(encoding="utf-8")
    assert text.lstrip().startswith("#")
    if path.name != "default.yaml":
        data = yaml.safe_load(text)
        assert data, "a preset lists at least one setting"
        changed = {(s, k) for s, kv in data.items() for k in kv}
        assert all(cfg[s][k] != default_config()[s][k] for s, k in changed), "a preset repeats a default"


def _step_functions():
    from pipeline.bifurcations import analyze_bifurcations, summarize_bifurcations
    from pipeline.flow import solve_flow
    from pipeline.levels import compute_levels
    from pipeline.measures import segment_table
    from pipeline.murray import network_summary

    return [(solve_flow, "flow"), (analyze_bifurcations, "bifurcations"), (summarize_bifurcations, "bifurcations"),
            (network_summary, "bifurcations"), (compute_levels, "levels"), (segment_table, "radii"),
            (segment_table, "measures")]


@pytest.mark.parametrize("func, section", _step_functions(), ids=lambda x: getattr(x, "__name__", x))
def test_step_keywords_have_the_config_defaults(func, section):
    # Options one way: a step takes its section's options as keyword-only
    # arguments whose defaults are the config's (analyze passes the
    # validated section; a direct caller gets the same defaults).
    import inspect

    params = inspect.signature(func).parameters
    shared = [k for k in SCHEMA[section] if k in params]
    assert shared, f"{func.__name__} takes none of the {section} options"
    for key in shared:
        assert params[key].kind is inspect.Parameter.KEYWORD_ONLY
        assert params[key].default == SCHEMA[section][key].default, key
