"""Configuration: the schema, defaults and every error path name the key at fault."""

from __future__ import annotations

import copy
from pathlib import Path

import pytest
import yaml

from panelpipe.config import REPO_ROOT, load_config, resolve_sources, validate_config
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
    (tmp_path / "notes.xlsx").write_text("x")
    with pytest.raises(PanelpipeError, match=r"neither CSV nor Parquet"):
        resolve_sources(["notes.xlsx"], analysis="a")


def test_load_config_reports_yaml_errors(tmp_path: Path) -> None:
    bad = tmp_path / "c.yaml"
    bad.write_text("analyses: [unclosed\n")
    with pytest.raises(PanelpipeError, match=r"c.yaml: not valid YAML"):
        load_config(bad)
    with pytest.raises(PanelpipeError, match=r"cannot read the configuration"):
        load_config(tmp_path / "absent.yaml")
