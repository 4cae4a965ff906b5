"""Read and check the configuration before anything runs.

The JSON Schema in ``workflow/schemas/config.schema.yaml`` is the single
definition of the keys; this module applies it (filling defaults) and adds the
checks a schema cannot express, such as that every source file exists.
"""

from __future__ import annotations

import copy
import glob
import os
import stat
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import jsonschema
import yaml

from .findings import PanelpipeError

__all__ = [
    "REPO_ROOT",
    "SCHEMA_PATH",
    "AnalysisSettings",
    "SourceSpec",
    "analysis_settings",
    "load_config",
    "resolve_sources",
    "source_files",
    "source_specs",
    "validate_config",
]

REPO_ROOT = Path(__file__).resolve().parents[2]
SCHEMA_PATH = REPO_ROOT / "workflow" / "schemas" / "config.schema.yaml"


@dataclass(frozen=True)
class AnalysisSettings:
    """The settings of one analysis after defaults are filled in."""

    name: str
    sources: tuple[Any, ...]
    unit: str
    period: str
    outcome: str
    regressors: tuple[str, ...]
    period_effects: bool
    cluster_by: tuple[str, ...]
    estimators: tuple[str, ...]
    inference: tuple[str, ...]
    level: float
    gates: Mapping[str, Any]
    bootstrap: Mapping[str, Any] = field(default_factory=dict)
    csv: Mapping[str, Any] = field(default_factory=dict)

    @property
    def columns(self) -> tuple[str, ...]:
        """Every column the analysis needs, without repeats, in a stable order."""
        wanted = [self.unit, self.period, self.outcome, *self.regressors, *self.cluster_by]
        return tuple(dict.fromkeys(wanted))

    def to_dict(self) -> dict[str, Any]:
        return {
            "sources": list(self.sources),
            "unit": self.unit,
            "period": self.period,
            "outcome": self.outcome,
            "regressors": list(self.regressors),
            "period_effects": self.period_effects,
            "cluster_by": list(self.cluster_by),
            "estimators": list(self.estimators),
            "inference": list(self.inference),
            "level": self.level,
            "gates": dict(self.gates),
            "bootstrap": dict(self.bootstrap),
            "csv": dict(self.csv),
        }


def _schema() -> dict[str, Any]:
    with SCHEMA_PATH.open(encoding="utf-8") as fh:
        schema: dict[str, Any] = yaml.safe_load(fh)
    return schema


def _fill_defaults(instance: Any, schema: Mapping[str, Any], root: Mapping[str, Any]) -> None:
    """Insert the schema's defaults for absent keys, recursing into objects."""
    if "$ref" in schema:
        ref = str(schema["$ref"]).removeprefix("#/").split("/")
        target: Any = root
        for part in ref:
            target = target[part]
        schema = target
    if not isinstance(instance, dict):
        return
    for key, sub in schema.get("properties", {}).items():
        if key not in instance and "default" in sub:
            instance[key] = copy.deepcopy(sub["default"])
        if key in instance:
            _fill_defaults(instance[key], sub, root)
    extra = schema.get("additionalProperties")
    if isinstance(extra, dict):
        for key, value in instance.items():
            if key not in schema.get("properties", {}):
                _fill_defaults(value, extra, root)


def _key_path(error: jsonschema.ValidationError) -> str:
    parts = []
    for p in error.absolute_path:
        parts.append(f"[{p}]" if isinstance(p, int) else f".{p}")
    return "".join(parts).lstrip(".") or "(top level)"


def _describe(error: jsonschema.ValidationError) -> str:
    where = _key_path(error)
    if error.validator == "additionalProperties":
        allowed = sorted(error.schema.get("properties", {}))
        return f"{where}: {error.message}; allowed keys here: {', '.join(allowed)}"
    if error.validator == "pattern" and error.schema.get("pattern", "").startswith("^[a-z0-9]"):
        return (
            f"{where}: analysis name {error.instance!r} is not a safe folder name; "
            "use lower-case letters, digits, '_' and '-', starting with a letter or digit"
        )
    return f"{where}: {error.message}"


def validate_config(raw: Any, *, origin: str = "config") -> dict[str, Any]:
    """Check a configuration against the schema and fill in the defaults.

    Parameters
    ----------
    raw
        The parsed YAML (not modified).
    origin
        Where it came from, quoted in error messages.

    Returns
    -------
    dict
        A new configuration with every default filled in.

    Raises
    ------
    PanelpipeError
        Listing every violation with the key path at fault.
    """
    if not isinstance(raw, dict):
        raise PanelpipeError(f"{origin}: the configuration must be a mapping of keys, not {raw!r}")
    schema = _schema()
    config = copy.deepcopy(raw)
    errors = sorted(
        jsonschema.Draft7Validator(schema).iter_errors(config), key=lambda e: list(e.path)
    )
    if errors:
        lines = "\n".join(f"  - {_describe(e)}" for e in errors)
        raise PanelpipeError(
            f"{origin}: the configuration is invalid:\n{lines}\n"
            "See config/README.md for every key and its meaning."
        )
    _fill_defaults(config, schema, schema)
    for name in config["analyses"]:
        settings = analysis_settings(config, name)
        for key in ("unit", "period", "outcome"):
            value = getattr(settings, key)
            if value in settings.regressors:
                raise PanelpipeError(
                    f"{origin}: analyses.{name}.regressors lists {value!r}, which is also the "
                    f"{key} column; remove it from the regressors."
                )
        if settings.unit == settings.period:
            raise PanelpipeError(
                f"{origin}: analyses.{name}: unit and period are both {settings.unit!r}; "
                "they must be two different columns."
            )
    return config


def load_config(path: str | Path) -> dict[str, Any]:
    """Read a YAML configuration file and validate it (see `validate_config`)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise PanelpipeError(f"{path}: cannot read the configuration ({exc.strerror}).") from exc
    try:
        raw = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise PanelpipeError(f"{path}: not valid YAML: {exc}") from exc
    return validate_config(raw, origin=str(path))


def analysis_settings(config: Mapping[str, Any], name: str) -> AnalysisSettings:
    """The settings of analysis ``name`` of a validated configuration."""
    a = config["analyses"][name]
    cluster_by = tuple(a.get("cluster_by") or ()) or (a["unit"],)
    return AnalysisSettings(
        name=name,
        sources=tuple(a["sources"]),
        unit=a["unit"],
        period=a["period"],
        outcome=a["outcome"],
        regressors=tuple(a["regressors"]),
        period_effects=bool(a["period_effects"]),
        cluster_by=cluster_by,
        estimators=tuple(a["estimators"]),
        inference=tuple(a["inference"]),
        level=float(a["level"]),
        gates=dict(a["gates"]),
        bootstrap=dict(a.get("bootstrap") or {}),
        csv=dict(a.get("csv") or {}),
    )


def _entry_path(entry: str | Mapping[str, Any]) -> str:
    return entry if isinstance(entry, str) else str(entry["path"])


_KINDS = (
    (stat.S_ISDIR, "a folder"),
    (stat.S_ISFIFO, "a named pipe"),
    (stat.S_ISSOCK, "a socket"),
    (stat.S_ISCHR, "a character device"),
    (stat.S_ISBLK, "a block device"),
)


def _check_regular(path: Path, pattern: str, analysis: str) -> None:
    """Refuse anything but a regular file (or a link to one) as a source.

    A folder or a dangling link would crash hashing, and a named pipe would block
    the run for ever, so each is refused by name before any file is opened.
    """
    where = f"analysis {analysis!r}: the source {str(path)!r}"
    if pattern != str(path):
        where += f" (matched by {pattern!r})"
    try:
        mode = path.stat().st_mode
    except FileNotFoundError:
        if path.is_symlink():
            raise PanelpipeError(
                f"{where} is a link to {os.readlink(path)!r}, which does not exist; "
                "restore the file it points to, or remove the link."
            ) from None
        raise
    except OSError as exc:
        raise PanelpipeError(f"{where} cannot be examined ({exc.strerror}).") from exc
    if not stat.S_ISREG(mode):
        kind = next((name for test, name in _KINDS if test(mode)), "not a regular file")
        raise PanelpipeError(
            f"{where} is {kind}; only regular files can be sources. Narrow the pattern "
            "in 'sources' or move the entry out of the delivery folder."
        )
    if not os.access(path, os.R_OK):
        raise PanelpipeError(
            f"{where} cannot be read (permission denied); give the user running "
            "panelpipe read access to it."
        )


def source_files(
    sources: tuple[Any, ...] | list[Any], *, analysis: str
) -> list[tuple[Path, dict[str, Any]]]:
    """Every source file in reading order, with the options of its entry.

    Globs are expanded and their matches sorted by name so that yearly files
    stack in order. The options are the entry's keys except ``path`` (empty for
    a plain path): everything that shapes how the file is read.

    Raises
    ------
    PanelpipeError
        If a path or pattern finds nothing, a match is not a regular readable
        file, a file is not CSV or Parquet, or a file is listed twice.
    """
    files: list[tuple[Path, dict[str, Any]]] = []
    for entry in sources:
        pattern = _entry_path(entry)
        options = {} if isinstance(entry, str) else {k: v for k, v in entry.items() if k != "path"}
        if glob.has_magic(pattern):
            matches = sorted(glob.glob(pattern))
            if not matches:
                raise PanelpipeError(
                    f"analysis {analysis!r}: the source pattern {pattern!r} matches no file "
                    f"(looked from {Path.cwd()}); check the path in 'sources'."
                )
        else:
            if not os.path.lexists(pattern):
                raise PanelpipeError(
                    f"analysis {analysis!r}: the source file {pattern!r} does not exist "
                    f"(looked from {Path.cwd()}); check the path in 'sources'."
                )
            matches = [pattern]
        for match in matches:
            _check_regular(Path(match), pattern, analysis)
            files.append((Path(match), options))
    suffixes = {".csv", ".parquet", ".pq", ".txt", ".tsv"}
    for p, _ in files:
        if p.suffix.lower() not in suffixes and not p.name.lower().endswith(".csv.gz"):
            raise PanelpipeError(
                f"analysis {analysis!r}: {p} is neither CSV nor Parquet "
                "(expected a name ending in .csv, .csv.gz, .tsv, .txt or .parquet)."
            )
    names = [str(p) for p, _ in files]
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise PanelpipeError(
            f"analysis {analysis!r}: the same file is listed twice in 'sources': "
            f"{', '.join(repeated)}."
        )
    return files


def resolve_sources(sources: tuple[Any, ...] | list[Any], *, analysis: str) -> list[Path]:
    """The source files in reading order (see `source_files`)."""
    return [path for path, _ in source_files(sources, analysis=analysis)]


@dataclass(frozen=True)
class SourceSpec:
    """One file to read, with the CSV options and renames that apply to it."""

    path: Path
    delimiter: str = ","
    decimal: str = "."
    encoding: str = "utf-8"
    missing: tuple[str, ...] = ("", "NA", "N/A", "n/a", "NaN", "nan", "NULL", "null", ".")
    rename: Mapping[str, str] = field(default_factory=dict)


def source_specs(
    sources: tuple[Any, ...] | list[Any], csv: Mapping[str, Any], *, analysis: str
) -> list[SourceSpec]:
    """Every source file with its reading options (analysis defaults, then per source)."""
    specs: list[SourceSpec] = []
    for path, entry_options in source_files(sources, analysis=analysis):
        options = {**csv, **entry_options}
        kwargs: dict[str, Any] = {}
        for key in ("delimiter", "decimal", "encoding"):
            if key in options:
                kwargs[key] = str(options[key])
        if "missing" in options:
            kwargs["missing"] = tuple(str(m) for m in options["missing"])
        if "rename" in options:
            kwargs["rename"] = dict(options["rename"])
        specs.append(SourceSpec(path, **kwargs))
    return specs
