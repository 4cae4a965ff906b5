"""Configuration: the schema, defaults and every error path name the key at fault."""

from __future__ import annotations

import copy
from pathlib import Path
from typing import get_args, get_type_hints

import pytest
import yaml

from _support import panel_settings
from panelpipe.config import (
    REPO_ROOT,
    BootstrapSettings,
    EstimatorKey,
    Gates,
    InferenceKey,
    analysis_settings,
    load_config,
    resolve_sources,
    validate_config,
)
from panelpipe.findings import PanelpipeError

DEMO = yaml.safe_load((REPO_ROOT / "config" / "config.yaml").read_text())


def _with(path: list[str], value: object) -> dict:
    cfg = copy.deepcopy(DEMO)
    node = cfg
    for key in path[:-1]:
        node = node[key]
    node[path[-1]] = value
    return cfg


def test_demo_config_is_valid_and_defaults_fill_in() -> None:
    cfg = copy.deepcopy(DEMO)
    del cfg["analyses"]["regional_jobs"]["level"]
    del cfg["output_dir"]
    out = validate_config(cfg)
    assert out["output_dir"] == "reports"
    assert out["analyses"]["regional_jobs"]["level"] == 0.95
    assert "level" not in cfg["analyses"]["regional_jobs"], "input must not be modified"


@pytest.mark.parametrize(
    ("path", "value", "match"),
    [
        (["analyses", "regional_jobs", "colour"], "red", r"regional_jobs: Additional properties"),
        (
            ["analyses", "regional_jobs", "period_effects"],
            "yes",
            r"period_effects: 'yes' is not of",
        ),
        (["analyses", "regional_jobs", "estimators"], [], r"estimators: \[\] should be non-empty"),
        (
            ["analyses", "regional_jobs", "estimators"],
            ["within_ols"],
            r"'within_ols' is not one of",
        ),
        (["analyses", "regional_jobs", "regressors"], ["a", "a"], r"regressors: .*non-unique"),
        (["analyses", "regional_jobs", "level"], 1.5, r"level: 1.5 is greater than or equal"),
        (["output_dir"], 3, r"output_dir: 3 is not of type 'string'"),
    ],
    ids=["unknown-key", "wrong-type", "empty-list", "bad-enum", "repeat", "level", "output"],
)
def test_config_errors_name_the_key(path: list[str], value: object, match: str) -> None:
    with pytest.raises(PanelpipeError, match=match):
        validate_config(_with(path, value))


def test_unsafe_analysis_name_is_rejected() -> None:
    cfg = copy.deepcopy(DEMO)
    cfg["analyses"]["../escape"] = cfg["analyses"].pop("regional_jobs")
    with pytest.raises(PanelpipeError, match=r"'../escape' is not a safe folder name"):
        validate_config(cfg)


def test_outcome_listed_as_regressor_is_rejected() -> None:
    cfg = _with(["analyses", "regional_jobs", "regressors"], ["youth_employment"])
    with pytest.raises(PanelpipeError, match=r"also the outcome column"):
        validate_config(cfg)


def test_missing_source_and_empty_glob(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    with pytest.raises(PanelpipeError, match=r"source file 'nowhere.csv' does not exist"):
        resolve_sources(["nowhere.csv"], analysis="a")
    with pytest.raises(PanelpipeError, match=r"pattern 'deliveries/\*.csv' matches no file"):
        resolve_sources(["deliveries/*.csv"], analysis="a")
    (tmp_path / "b_2021.csv").write_text("x\n")
    (tmp_path / "a_2020.csv").write_text("x\n")
    assert [p.name for p in resolve_sources(["*.csv"], analysis="a")] == [
        "a_2020.csv",
        "b_2021.csv",
    ]
    (tmp_path / "notes.docx").write_text("x")
    with pytest.raises(PanelpipeError, match=r"not a kind of file panelpipe reads"):
        resolve_sources(["notes.docx"], analysis="a")


def test_load_config_reports_yaml_errors(tmp_path: Path) -> None:
    bad = tmp_path / "c.yaml"
    bad.write_text("analyses: [unclosed\n")
    with pytest.raises(PanelpipeError, match=r"c.yaml: not valid YAML"):
        load_config(bad)
    with pytest.raises(PanelpipeError, match=r"cannot read the configuration"):
        load_config(tmp_path / "absent.yaml")


def _load_text(tmp_path: Path, text: str) -> dict:
    path = tmp_path / "c.yaml"
    path.write_text(text, encoding="utf-8")
    return load_config(path)


def test_every_config_of_the_project_still_loads() -> None:
    load_config(REPO_ROOT / "config" / "config.yaml")


def test_a_repeated_key_names_both_lines(tmp_path: Path) -> None:
    text = yaml.safe_dump(DEMO, sort_keys=False)
    with pytest.raises(PanelpipeError, match=r"c.yaml, line 2: the key 'output_dir' appears twice"):
        _load_text(tmp_path, text.replace("analyses:", "output_dir: elsewhere\nanalyses:"))
    with pytest.raises(
        PanelpipeError, match=r"key 1 appears twice in one mapping \(lines 1 and 1\)"
    ):
        _load_text(tmp_path, "{1: a, 0x1: b}\n")  # equal once read: YAML would keep one


def test_an_inline_merge_keeps_safe_load_semantics(tmp_path: Path) -> None:
    text = yaml.safe_dump(DEMO, sort_keys=False)
    text = text.replace("  regional_jobs:\n", "  regional_jobs:\n    <<: {level: 0.9}\n")
    assert yaml.safe_load(text)["analyses"]["regional_jobs"]["level"] == 0.95  # PyYAML
    assert _load_text(tmp_path, text)["analyses"]["regional_jobs"]["level"] == 0.95


def test_anchors_and_aliases_are_refused_before_expansion(tmp_path: Path) -> None:
    with pytest.raises(PanelpipeError, match=r"line 1: anchors and aliases"):
        _load_text(tmp_path, "a: &x [1]\nb: *x\n")
    with pytest.raises(PanelpipeError, match=r"line 2: anchors and aliases"):
        _load_text(tmp_path, "a: 1\nb: *x\n")


def test_deep_nesting_and_bad_bytes_are_clear_errors(tmp_path: Path) -> None:
    with pytest.raises(PanelpipeError, match=r"nested deeper than 32 levels"):
        _load_text(tmp_path, "analyses: " + "[" * 40 + "]" * 40 + "\n")
    with pytest.raises(PanelpipeError, match=r"nested deeper than 32 levels"):
        _load_text(tmp_path, "analyses: " + "[" * 5000 + "]" * 5000 + "\n")
    path = tmp_path / "c.yaml"
    path.write_bytes(b"output_dir: r\xe9ports\n")
    with pytest.raises(PanelpipeError, match=r"not UTF-8 text \(byte 14\)"):
        load_config(path)


@pytest.mark.parametrize(
    ("path", "value", "match"),
    [
        (["analyses", "regional_jobs", "level"], 0.5, r"level: 0.5 is less than or equal"),
        (["analyses", "regional_jobs", "level"], 1.0, r"level: 1.0 is greater than or equal"),
        (["analyses", "regional_jobs", "gates", "max_dropped_share"], -0.1, r"less than"),
        (["analyses", "regional_jobs", "gates", "max_dropped_share"], 1.01, r"greater than"),
        (["analyses", "regional_jobs", "gates", "min_units"], 1, r"min_units: 1 is less than"),
        (["analyses", "regional_jobs", "gates", "min_units"], 2.0, r"2.0 is not of type"),
        (["analyses", "regional_jobs", "gates", "min_clusters"], True, r"True is not of type"),
        (["analyses", "regional_jobs", "bootstrap", "draws"], 98, r"draws: 98 is less than"),
        (["analyses", "regional_jobs", "bootstrap", "draws"], 100_000, r"greater than the max"),
        (["analyses", "regional_jobs", "level"], float("nan"), r"level: nan is not a finite"),
        (["output_dir"], [1.0, {"x": float("-inf")}], r"output_dir\[1\].x: -inf is not a finite"),
    ],
    ids=[
        "level-half",
        "level-one",
        "share-negative",
        "share-above-one",
        "units-one",
        "units-float",
        "clusters-bool",
        "draws-few",
        "draws-many",
        "nan",
        "deep-inf",
    ],
)
def test_numbers_out_of_range_are_refused(path: list[str], value: object, match: str) -> None:
    with pytest.raises(PanelpipeError, match=match):
        validate_config(_with(path, value))


@pytest.mark.parametrize(
    "name",
    ["t\n", "t\r\n", "a/b", "..", "x" * 65, "ré", "Jobs", "-t", ""],
    ids=["newline", "crlf", "slash", "dots", "long", "accent", "upper", "dash-first", "empty"],
)
def test_unsafe_analysis_names_are_refused_for_real(name: str) -> None:
    cfg = copy.deepcopy(DEMO)
    cfg["analyses"] = {name: cfg["analyses"]["regional_jobs"]}
    with pytest.raises(PanelpipeError, match=r"is not a safe folder name; use lower-case"):
        validate_config(cfg)


def test_the_longest_safe_name_is_accepted() -> None:
    cfg = copy.deepcopy(DEMO)
    cfg["analyses"] = {"x" * 64: cfg["analyses"]["regional_jobs"]}
    validate_config(cfg)


def test_messages_never_echo_a_huge_value() -> None:
    with pytest.raises(PanelpipeError) as caught:
        validate_config(_with(["analyses", "regional_jobs", "unit"], ["x" * 10_000] * 1_000))
    assert len(str(caught.value)) < 1_000
    with pytest.raises(PanelpipeError) as caught:
        validate_config(["y" * 1_000_000])
    assert len(str(caught.value)) < 1_000
    many = {f"key{i}": 1 for i in range(5_000)}
    with pytest.raises(PanelpipeError, match=r"and more; allowed keys") as caught:
        validate_config(_with(["analyses", "regional_jobs", "gates"], many))
    assert len(str(caught.value)) < 1_000


def test_reserved_names_follow_the_package() -> None:
    from panelpipe.config import RESERVED_COLUMNS, RESERVED_PREFIXES
    from panelpipe.estimate import INTERCEPT, MEAN_PREFIX, PERIOD_PREFIX
    from panelpipe.ingest import LINE, SOURCE

    assert {SOURCE, LINE, INTERCEPT} <= set(RESERVED_COLUMNS)
    assert {PERIOD_PREFIX, MEAN_PREFIX} <= set(RESERVED_PREFIXES)


@pytest.mark.parametrize(
    ("key", "value"),
    [
        ("regressors", ["subsidy_rate", "_intercept"]),
        ("regressors", ["_period_2016"]),
        ("outcome", "_unit_mean_subsidy_rate"),
        ("cluster_by", ["_source"]),
        ("unit", "_line"),
        ("unit", "old"),
        ("period", "column"),
    ],
)
def test_internal_column_names_are_refused(key: str, value: object) -> None:
    shown = value if isinstance(value, str) else value[-1]
    with pytest.raises(
        PanelpipeError, match=rf"regional_jobs.{key}: the column name '{shown}' is taken.*'rename'"
    ):
        validate_config(_with(["analyses", "regional_jobs", key], value))


def test_ordinary_names_like_internal_words_are_accepted() -> None:
    cfg = _with(["analyses", "regional_jobs", "regressors"], ["size", "new", "intercept"])
    validate_config(cfg)


@pytest.mark.parametrize("key", [2024, True, None, 1.5], ids=["int", "bool", "null", "float"])
def test_keys_that_are_not_text_are_refused(key: object) -> None:
    cfg = copy.deepcopy(DEMO)
    cfg["analyses"] = {key: cfg["analyses"]["regional_jobs"]}
    with pytest.raises(PanelpipeError, match=rf"analyses: the key {key!r} is not text; quote it"):
        validate_config(cfg)


def test_bootstrap_and_gates_are_typed_and_filled_from_the_schema_in_one_place() -> None:
    """One default per setting: the bootstrap seed no longer falls back to two values."""
    schema = yaml.safe_load((REPO_ROOT / "workflow/schemas/config.schema.yaml").read_text())
    props = schema["definitions"]["analysis"]["properties"]
    wanted_boot = {k: v["default"] for k, v in props["bootstrap"]["properties"].items()}
    wanted_gates = {k: v["default"] for k, v in props["gates"]["properties"].items()}
    # Settings built without a configuration (as the tests and tools do) ...
    bare = panel_settings()
    assert isinstance(bare.bootstrap, BootstrapSettings)
    assert isinstance(bare.gates, Gates)
    assert bare.bootstrap.seed == wanted_boot["seed"]
    assert bare.to_dict()["bootstrap"] == wanted_boot
    assert bare.to_dict()["gates"] == wanted_gates
    # ... and from a validated configuration agree, and to_dict (which enters the run id)
    # is the configuration's own filled-in mapping.
    cfg = copy.deepcopy(DEMO)
    cfg["analyses"]["regional_jobs"].pop("bootstrap", None)
    cfg["analyses"]["regional_jobs"]["gates"] = {"min_clusters": 3}
    filled = validate_config(cfg)
    settings = analysis_settings(filled, "regional_jobs")
    assert settings.bootstrap.seed == bare.bootstrap.seed
    assert settings.gates.min_clusters == 3
    assert settings.to_dict()["bootstrap"] == filled["analyses"]["regional_jobs"]["bootstrap"]
    assert settings.to_dict()["gates"] == filled["analyses"]["regional_jobs"]["gates"]


def test_the_literal_keys_are_the_schema_choices() -> None:
    schema = yaml.safe_load((REPO_ROOT / "workflow/schemas/config.schema.yaml").read_text())
    props = schema["definitions"]["analysis"]["properties"]
    assert list(get_args(EstimatorKey)) == props["estimators"]["items"]["enum"]
    assert list(get_args(InferenceKey)) == props["inference"]["items"]["enum"]
    assert set(get_args(get_type_hints(BootstrapSettings)["weights"])) == set(
        props["bootstrap"]["properties"]["weights"]["enum"]
    )
