"""Read and check the configuration before anything runs.

The JSON Schema ``workflow/schemas/config.schema.yaml`` (`SCHEMA_PATH`) is the single
definition of the keys; this module applies it (filling defaults) and adds the
checks a schema cannot express, such as that every source file exists.

A configuration steers unattended runs, so anything that could make it mean
something other than what it says is refused: repeated keys (YAML would keep the
last one silently), anchors and aliases (which also let a few hundred bytes
expand to gigabytes), numbers that are not finite, and column names that the
package uses for its own columns. Files above :data:`MAX_CONFIG_BYTES` are not
read, and values echoed in messages are shortened.
"""

from __future__ import annotations

import codecs
import copy
import fnmatch
import glob
import math
import os
import stat
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from functools import cache
from pathlib import Path
from typing import Any, ClassVar, Literal, TypeVar

import jsonschema
import yaml

from .findings import PanelpipeError

__all__ = [
    "KEY_COLUMN_NAMES",
    "MAX_CONFIG_BYTES",
    "REPO_ROOT",
    "RESERVED_COLUMNS",
    "RESERVED_PREFIXES",
    "SCHEMA_PATH",
    "WORKFLOW_ROOT",
    "AnalysisSettings",
    "BootstrapSettings",
    "DatabaseSpec",
    "EstimatorKey",
    "Gates",
    "InferenceKey",
    "SourceSpec",
    "analysis_settings",
    "file_kind",
    "load_config",
    "renamed_columns",
    "resolve_sources",
    "source_entries",
    "source_files",
    "source_spec_of",
    "source_specs",
    "validate_config",
]

REPO_ROOT = Path(__file__).resolve().parents[2]
"""The repository of a source checkout (meaningless for a non-editable install)."""

_PACKAGED_WORKFLOW = Path(__file__).resolve().parent / "_workflow"

WORKFLOW_ROOT = _PACKAGED_WORKFLOW if (_PACKAGED_WORKFLOW / "Snakefile").is_file() else REPO_ROOT
"""The folder holding the ``Snakefile`` and ``workflow/{rules,scripts,schemas}``.

A non-editable install carries copies of them inside the package (setup.py puts
them in ``panelpipe/_workflow``); a source checkout and an editable install use the
repository's own.
"""

SCHEMA_PATH = WORKFLOW_ROOT / "workflow" / "schemas" / "config.schema.yaml"

MAX_CONFIG_BYTES = 1 << 20
"""Largest configuration file read (1 MiB); real configs are a few kilobytes."""

_MAX_DEPTH = 32
"""Deepest nesting of mappings and lists accepted (real configs nest about six deep)."""

_SHOWN_CHARS = 120
"""Longest excerpt of a value quoted in a message."""

_SHOWN_ERRORS = 20
"""Most schema violations listed in one message."""

RESERVED_COLUMNS: Mapping[str, str] = {
    "_source": "the file each row came from",
    "_line": "the line each row came from",
    "_intercept": "the constant of every regression",
}
"""Column names the package gives its own columns (ingest.py and estimate.py), and why."""

RESERVED_PREFIXES: Mapping[str, str] = {
    "_period_": "the period dummies",
    "_unit_mean_": "the unit means of the correlated random effects model",
}
"""Name prefixes of columns the package derives (estimate.py), and what they hold."""

KEY_COLUMN_NAMES: Mapping[str, str] = {
    name: "the table of revised cells between two runs" for name in ("column", "old", "new", "size")
}
"""Names the unit and period columns may not have: that table (changes.py) uses them."""


EstimatorKey = Literal[
    "pooled_ols",
    "fixed_effects",
    "random_effects",
    "first_difference",
    "between",
    "correlated_random_effects",
]
InferenceKey = Literal["classical", "robust", "cluster", "driscoll_kraay", "wild_bootstrap"]


@cache
def _schema_defaults(key: str) -> Mapping[str, Any]:
    """The schema's default of every property of the analysis key ``key`` (an object)."""
    properties = _schema()["definitions"]["analysis"]["properties"][key]["properties"]
    return {name: spec["default"] for name, spec in properties.items()}


_Filled = TypeVar("_Filled", bound="_SchemaFilled")


class _SchemaFilled:
    """A settings group whose absent keys take the schema's defaults, read in one place."""

    _key: ClassVar[str]

    @classmethod
    def from_mapping(cls: type[_Filled], given: Mapping[str, Any]) -> _Filled:
        """From a validated mapping of the group's keys; absent keys take their defaults."""
        return cls(**{**_schema_defaults(cls._key), **given})


@dataclass(frozen=True)
class BootstrapSettings(_SchemaFilled):
    """The wild cluster bootstrap's settings (``bootstrap`` in the configuration)."""

    _key: ClassVar[str] = "bootstrap"

    draws: int
    seed: int
    weights: Literal["auto", "rademacher", "webb"]


@dataclass(frozen=True)
class Gates(_SchemaFilled):
    """Thresholds that fail an unattended run before estimation (``gates``)."""

    _key: ClassVar[str] = "gates"

    min_units: int
    min_periods: int
    min_clusters: int
    max_dropped_share: float


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
    estimators: tuple[EstimatorKey, ...]
    inference: tuple[InferenceKey, ...]
    level: float
    gates: Gates = field(default_factory=lambda: Gates.from_mapping({}))
    bootstrap: BootstrapSettings = field(default_factory=lambda: BootstrapSettings.from_mapping({}))
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
            "gates": asdict(self.gates),
            "bootstrap": asdict(self.bootstrap),
            "csv": dict(self.csv),
        }


def _schema() -> dict[str, Any]:
    with SCHEMA_PATH.open(encoding="utf-8") as fh:
        schema: dict[str, Any] = yaml.safe_load(fh)
    return schema


def _cut(text: str, limit: int = _SHOWN_CHARS) -> str:
    """``text`` cut to ``limit`` characters: a hostile value is never echoed whole."""
    return text if len(text) <= limit else f"{text[:limit]}... ({len(text):,} characters)"


def _short(value: Any) -> str:
    return _cut(repr(value))


class _Refused(yaml.YAMLError):
    """A YAML construct a configuration may not use, at a 1-based line."""

    def __init__(self, line: int, message: str) -> None:
        super().__init__(message)
        self.line = line
        self.message = message


class _StrictLoader(yaml.SafeLoader):
    """``yaml.safe_load``'s loader, refusing repeated keys, anchors and aliases.

    Aliases are refused while the document is composed, before any of it is
    expanded, so a config of nested aliases costs nothing. No config of this tool
    needs them: every analysis states its own keys.
    """

    def compose_node(self, parent: yaml.Node | None, index: Any) -> yaml.Node | None:
        event = self.peek_event()
        if isinstance(event, yaml.AliasEvent) or getattr(event, "anchor", None) is not None:
            raise _Refused(
                event.start_mark.line + 1,
                "anchors and aliases (&name, *name) are not accepted in a panelpipe "
                "configuration; write each value out where it is used.",
            )
        return super().compose_node(parent, index)

    def construct_mapping(self, node: yaml.MappingNode, deep: bool = False) -> dict[Any, Any]:
        seen: dict[Any, int] = {}
        for key_node, _ in node.value:
            if key_node.tag == "tag:yaml.org,2002:merge":
                continue  # "<<": merged keys may be overridden, as in yaml.safe_load
            key = self.construct_object(key_node, deep=True)
            line = key_node.start_mark.line + 1
            if isinstance(key, (list, dict)):
                continue  # unhashable: the base class reports it
            if key in seen:
                raise _Refused(
                    line,
                    f"the key {_short(key)} appears twice in one mapping (lines {seen[key]} and "
                    f"{line}); YAML would silently keep only the last. Keep one of them "
                    "(two analyses need two different names).",
                )
            seen[key] = line
        return super().construct_mapping(node, deep=deep)


def _nodes(value: Any, where: str = "", depth: int = 0) -> Iterator[tuple[str, Any, int]]:
    """Every value below ``value`` with its key path and depth (mappings and lists)."""
    yield where, value, depth
    if isinstance(value, dict):
        items: Any = ((f"{where}.{k}" if where else str(k), v) for k, v in value.items())
    elif isinstance(value, list):
        items = ((f"{where}[{i}]", v) for i, v in enumerate(value))
    else:
        return
    if depth >= _MAX_DEPTH:
        return
    for path, sub in items:
        yield from _nodes(sub, path, depth + 1)


def _check_values(raw: Any, origin: str) -> None:
    """Refuse non-finite numbers, keys that are not text, and needlessly deep nesting.

    A NaN compares false with every bound, so the schema alone would accept
    ``level: .nan`` (empty intervals) or a NaN gate (switched off). The schema's
    name rules apply to text only, so ``2024:`` or ``yes:`` as a key would pass them.
    """
    for where, value, depth in _nodes(raw):
        at = _cut(where, 2 * _SHOWN_CHARS) or "(top level)"
        if depth >= _MAX_DEPTH and isinstance(value, (dict, list)):
            raise PanelpipeError(
                f"{origin}: {at}: nested deeper than {_MAX_DEPTH} levels; no panelpipe "
                "setting needs that. See config/README.md."
            )
        if isinstance(value, float) and not math.isfinite(value):
            raise PanelpipeError(
                f"{origin}: {at}: {value} is not a finite number; "
                "write an ordinary number (see config/README.md for the allowed range)."
            )
        for key in value if isinstance(value, dict) else ():
            if not isinstance(key, str):
                raise PanelpipeError(
                    f"{origin}: {at}: the key {_short(key)} is not text; quote it "
                    f'("{key}": ...) if it is meant as a name.'
                )


def _whole_number(checker: Any, instance: Any) -> bool:
    # Draft 7 counts 9999.0 as an integer; a count written with a decimal point is
    # more likely a mistake, and code that uses it as a count would fail later.
    return isinstance(instance, int) and not isinstance(instance, bool)


_Validator = jsonschema.validators.extend(
    jsonschema.Draft7Validator,
    type_checker=jsonschema.Draft7Validator.TYPE_CHECKER.redefine("integer", _whole_number),
)


def _reserved_column(key: str, column: str) -> str | None:
    """Why ``column`` may not be used as the ``key`` column, or None when it may."""
    if column in RESERVED_COLUMNS:
        return RESERVED_COLUMNS[column]
    for prefix, meaning in RESERVED_PREFIXES.items():
        if column.startswith(prefix):
            return f"{meaning} are named {prefix}..."
    if key in ("unit", "period") and column in KEY_COLUMN_NAMES:
        return KEY_COLUMN_NAMES[column]
    return None


def _check_columns(settings: AnalysisSettings, origin: str) -> None:
    """Refuse column names that collide with the package's own columns."""
    named = [
        ("unit", settings.unit),
        ("period", settings.period),
        ("outcome", settings.outcome),
        *(("regressors", c) for c in settings.regressors),
        *(("cluster_by", c) for c in settings.cluster_by),
    ]
    for key, column in named:
        why = _reserved_column(key, column)
        if why is not None:
            raise PanelpipeError(
                f"{origin}: analyses.{settings.name}.{key}: the column name {_short(column)} "
                f"is taken inside panelpipe ({why}). Rename the column on reading with a "
                "source's 'rename' option, e.g. sources: [{path: FILE, rename: "
                f"{{{column}: new_name}}}}], and use the new name here."
            )


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
    where = _cut(_key_path(error), 2 * _SHOWN_CHARS)
    if "propertyNames" in error.schema_path:
        return (
            f"{where}: analysis name {_short(error.instance)} is not a safe folder name; "
            "use lower-case letters, digits, '_' and '-', starting with a letter or digit, "
            "at most 64 characters"
        )
    message = error.message
    if error.validator == "additionalProperties":
        allowed = sorted(error.schema.get("properties", {}))
        if len(message) > 2 * _SHOWN_CHARS:
            extra = sorted(set(error.instance) - set(allowed), key=str)
            message = f"unknown keys {', '.join(map(_short, extra[:5]))} and more"
        return f"{where}: {message}; allowed keys here: {', '.join(allowed)}"
    shown = repr(error.instance)
    if len(message) > 2 * _SHOWN_CHARS and message.startswith(shown):
        message = _cut(shown) + message[len(shown) :]  # jsonschema quotes the whole value
    return f"{where}: {_cut(message, 4 * _SHOWN_CHARS)}"


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
        raise PanelpipeError(
            f"{origin}: the configuration must be a mapping of keys, not {_short(raw)}"
        )
    _check_values(raw, origin)
    schema = _schema()
    config = copy.deepcopy(raw)
    errors = sorted(_Validator(schema).iter_errors(config), key=lambda e: [str(p) for p in e.path])
    if errors:
        lines = "\n".join(f"  - {_describe(e)}" for e in errors[:_SHOWN_ERRORS])
        more = len(errors) - _SHOWN_ERRORS
        if more > 0:
            lines += f"\n  - ... and {more:,} more"
        raise PanelpipeError(
            f"{origin}: the configuration is invalid:\n{lines}\n"
            "See config/README.md for every key and its meaning."
        )
    _fill_defaults(config, schema, schema)
    for name in config["analyses"]:
        settings = analysis_settings(config, name)
        _check_columns(settings, origin)
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
    """Read a YAML configuration file and validate it (see `validate_config`).

    The file is read as ``yaml.safe_load`` would, except that a file above
    :data:`MAX_CONFIG_BYTES`, a key repeated within one mapping, and anchors or
    aliases are refused with the line at fault.
    """
    path = Path(path)
    try:
        with path.open("rb") as fh:
            data = fh.read(MAX_CONFIG_BYTES + 1)
    except OSError as exc:
        raise PanelpipeError(f"{path}: cannot read the configuration ({exc.strerror}).") from exc
    if len(data) > MAX_CONFIG_BYTES:
        raise PanelpipeError(
            f"{path}: larger than 1 MiB; a panelpipe configuration is a few kilobytes. "
            "Check that this is the configuration file."
        )
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise PanelpipeError(
            f"{path}: not UTF-8 text (byte {exc.start + 1}); save the configuration as UTF-8."
        ) from exc
    try:
        raw = yaml.load(text, Loader=_StrictLoader)  # a SafeLoader: builds plain data only
    except _Refused as exc:
        raise PanelpipeError(f"{path}, line {exc.line}: {exc.message}") from exc
    except yaml.YAMLError as exc:
        raise PanelpipeError(f"{path}: not valid YAML: {_cut(str(exc), 4 * _SHOWN_CHARS)}") from exc
    except RecursionError as exc:
        raise PanelpipeError(
            f"{path}: nested deeper than {_MAX_DEPTH} levels; no panelpipe setting needs that."
        ) from exc
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
        gates=Gates.from_mapping(a["gates"]),
        bootstrap=BootstrapSettings.from_mapping(a["bootstrap"]),
        csv=dict(a.get("csv") or {}),
    )


_TEXT_ENDINGS = (".csv", ".tsv", ".txt")
_COMPRESSED_ENDINGS = (".gz", ".zst", ".bz2")
_KINDS_BY_ENDING = {
    **{e: "csv" for e in _TEXT_ENDINGS},
    **{t + c: "csv" for t in _TEXT_ENDINGS for c in _COMPRESSED_ENDINGS},
    ".parquet": "parquet",
    ".pq": "parquet",
    ".arrow": "arrow",
    ".feather": "arrow",
    ".xlsx": "workbook",
    ".ods": "workbook",
}
_KNOWN_ENDINGS = (
    ".csv, .tsv, .txt (also compressed: .csv.gz, .csv.zst, .csv.bz2), .parquet, "
    ".arrow, .feather, .xlsx or .ods"
)


def file_kind(path: Path) -> str | None:
    """How a source file is read, from its name: csv, parquet, arrow or workbook.

    Compressed text (``.csv.gz``, ``.tsv.zst``, ``.txt.bz2``...) is ``csv``: it is
    decompressed as it is read. Any other name gives None.
    """
    suffixes = [s.lower() for s in path.suffixes[-2:]]
    for n in (2, 1):
        kind = _KINDS_BY_ENDING.get("".join(suffixes[-n:]))
        if kind:
            return kind
    return None


def _entry_path(entry: str | Mapping[str, Any]) -> str:
    return entry if isinstance(entry, str) else str(entry["path"])


def _is_database(entry: Any) -> bool:
    return isinstance(entry, Mapping) and "database" in entry


@dataclass(frozen=True)
class DatabaseSpec:
    """A ``{database, query}`` source: rows a query returns, not a file.

    ``label`` names the source in every message and in the rows' ``_source``
    column: the URL as written (a URL carrying a password is refused before any
    connection, see `panelpipe.database`), followed by ``[query N]`` when one
    database serves several queries of the analysis. ``expect`` is the SHA-256 of
    the rows as planned (empty when not yet planned); a read that returns other
    rows refuses the run.
    """

    database: str
    query: str
    label: str
    rename: Mapping[str, str] = field(default_factory=dict)
    expect: str = ""

    @property
    def options(self) -> dict[str, Any]:
        """What the run id hashes besides the rows (the URL, like a file's path, is not)."""
        return {"query": self.query, "rename": dict(self.rename)}


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


def _entry_files(
    entry: str | Mapping[str, Any], analysis: str
) -> list[tuple[Path, dict[str, Any]]]:
    """The files one (file) entry of 'sources' names, with the entry's options."""
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
    return [(Path(match), options) for match in matches]


def _check_files(files: list[tuple[Path, dict[str, Any]]], analysis: str) -> None:
    """Refuse a file of no kind `file_kind` knows, workbook options on another kind of
    file, and a file listed twice."""
    for p, options in files:
        kind = file_kind(p)
        if kind is None:
            raise PanelpipeError(
                f"analysis {analysis!r}: {p} is not a kind of file panelpipe reads "
                f"(expected a name ending in {', '.join(_KNOWN_ENDINGS)})."
            )
        if kind != "workbook" and ("sheet" in options or "header_row" in options):
            raise PanelpipeError(
                f"analysis {analysis!r}: the source {str(p)!r} is not a workbook (.xlsx, .ods); "
                "'sheet' and 'header_row' apply to workbooks only. Remove them from this entry."
            )
    names = [str(p) for p, _ in files]
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise PanelpipeError(
            f"analysis {analysis!r}: the same file is listed twice in 'sources': "
            f"{', '.join(repeated)}."
        )


def _database_specs(sources: tuple[Any, ...] | list[Any], analysis: str) -> list[DatabaseSpec]:
    """The database entries of 'sources' in order, labelled (see `DatabaseSpec`)."""
    entries = [e for e in sources if _is_database(e)]
    urls = [str(e["database"]) for e in entries]
    pairs = [(u, str(e["query"])) for u, e in zip(urls, entries, strict=True)]
    repeated = sorted({f"{u} {q!r}" for u, q in pairs if pairs.count((u, q)) > 1})
    if repeated:
        raise PanelpipeError(
            f"analysis {analysis!r}: the same database query is listed twice in 'sources': "
            f"{_cut(', '.join(repeated))}."
        )
    specs = []
    for i, (url, entry) in enumerate(zip(urls, entries, strict=True)):
        label = url if urls.count(url) == 1 else f"{url} [query {urls[: i + 1].count(url)}]"
        specs.append(DatabaseSpec(url, str(entry["query"]), label, dict(entry.get("rename") or {})))
    return specs


def source_entries(
    sources: tuple[Any, ...] | list[Any], *, analysis: str
) -> list[tuple[Path, dict[str, Any]] | DatabaseSpec]:
    """Every source in reading order: (file, options of its entry) or a `DatabaseSpec`.

    Globs are expanded and their matches sorted by name so that yearly files
    stack in order. A file's options are its entry's keys except ``path`` (empty
    for a plain path): everything that shapes how the file is read.

    Raises
    ------
    PanelpipeError
        If a path or pattern finds nothing, a match is not a regular readable
        file, a file is of no kind `file_kind` knows, a workbook option is given
        for another kind of file, or a file or query is listed twice.
    """
    databases = iter(_database_specs(sources, analysis))
    out: list[tuple[Path, dict[str, Any]] | DatabaseSpec] = []
    for entry in sources:
        if _is_database(entry):
            out.append(next(databases))
        else:
            out.extend(_entry_files(entry, analysis))
    _check_files([item for item in out if not isinstance(item, DatabaseSpec)], analysis)
    return out


def source_files(
    sources: tuple[Any, ...] | list[Any], *, analysis: str
) -> list[tuple[Path, dict[str, Any]]]:
    """Every source file in reading order, with its options (see `source_entries`).

    Database entries are not files and are left out.
    """
    return [item for item in source_entries(sources, analysis=analysis) if isinstance(item, tuple)]


def resolve_sources(sources: tuple[Any, ...] | list[Any], *, analysis: str) -> list[Path]:
    """The source files in reading order (see `source_files`)."""
    return [path for path, _ in source_files(sources, analysis=analysis)]


def renamed_columns(
    where: str,
    rename: Mapping[str, str],
    available: Sequence[str],
    columns: Sequence[str],
    *,
    holder: str,
    fix: str,
) -> list[str]:
    """A source's column names after its 'rename', checked against what the analysis needs.

    ``holder`` names the source in the message ("the file", "the result") and
    ``fix`` says how to supply a missing column.

    Raises
    ------
    PanelpipeError
        If 'rename' names a column the source lacks, or a needed column is missing.
    """
    has = ", ".join(map(repr, available))
    unknown = sorted(set(rename) - set(available))
    if unknown:
        raise PanelpipeError(
            f"{where}: 'rename' names column(s) {', '.join(map(repr, unknown))} that {holder} "
            f"does not have; {holder} has {has}."
        )
    seen = [rename.get(c, c) for c in available]
    missing = [c for c in columns if c not in seen]
    if missing:
        raise PanelpipeError(
            f"{where}: column(s) {', '.join(map(repr, missing))} not found; {holder} has "
            f"{has}. {fix}"
        )
    return seen


@dataclass(frozen=True)
class SourceSpec:
    """One file to read, with the reading options and renames that apply to it.

    ``sheet`` and ``header_row`` (1-based) choose the table of a workbook; None
    means the first sheet and its first row that holds anything.

    Raises
    ------
    PanelpipeError
        If an option cannot be used to read a file (a delimiter that is not one
        ASCII character, an encoding Python does not know, one mark used for two
        purposes), naming the file and the option.
    """

    path: Path
    delimiter: str = ","
    decimal: str = "."
    encoding: str = "utf-8"
    missing: tuple[str, ...] = ("", "NA", "N/A", "n/a", "NaN", "nan", "NULL", "null", ".")
    rename: Mapping[str, str] = field(default_factory=dict)
    thousands: str = ""
    sheet: str | None = None
    header_row: int | None = None

    def __post_init__(self) -> None:
        where = f"{self.path}: the 'delimiter' option"
        if len(self.delimiter) != 1 or not self.delimiter.isascii():
            raise PanelpipeError(
                f"{where} {self.delimiter!r} must be one ASCII character, such as ',', ';', "
                "'|' or a tab; save the file with such a delimiter."
            )
        if self.delimiter in {'"', "\n", "\r"} or self.delimiter.isalnum():
            raise PanelpipeError(
                f"{where} {self.delimiter!r} cannot be a quote, a line end, a letter or a "
                "digit; use ',', ';', '|' or a tab."
            )
        marks = {"delimiter": self.delimiter, "decimal": self.decimal}
        if self.thousands:
            marks["thousands"] = self.thousands
        if len(set(marks.values())) < len(marks):
            raise PanelpipeError(
                f"{self.path}: the options {', '.join(f'{k}={v!r}' for k, v in marks.items())} "
                "use one character for two purposes; numbers could not be told apart. "
                "Change the 'csv' options (or this source's)."
            )
        if self.header_row is not None and self.header_row < 1:
            raise PanelpipeError(
                f"{self.path}: the 'header_row' option {self.header_row} must be 1 or more "
                "(1 = the first row of the sheet)."
            )
        try:
            codecs.lookup(self.encoding)
        except LookupError:
            raise PanelpipeError(
                f"{self.path}: the encoding {self.encoding!r} is not one Python knows; use a "
                "name such as utf-8, latin-1, cp1252 or utf-16."
            ) from None


def _entry_options(entry: str | Mapping[str, Any], csv: Mapping[str, Any]) -> dict[str, Any]:
    """The `SourceSpec` keyword arguments of a sources entry (analysis defaults first)."""
    options = {**csv, **({} if isinstance(entry, str) else entry)}
    kwargs: dict[str, Any] = {}
    for key in ("delimiter", "decimal", "encoding", "thousands"):
        if key in options:
            kwargs[key] = str(options[key])
    if "sheet" in options:
        kwargs["sheet"] = str(options["sheet"])
    if "header_row" in options:
        kwargs["header_row"] = int(options["header_row"])
    if "missing" in options:
        kwargs["missing"] = tuple(str(m) for m in options["missing"])
    if "rename" in options:
        kwargs["rename"] = dict(options["rename"])
    return kwargs


def source_spec_of(
    path: str, sources: tuple[Any, ...] | list[Any], csv: Mapping[str, Any]
) -> SourceSpec:
    """The reading options of a file already read, from the entry that listed it.

    Pure (no file system): a plain entry matches its own path, a glob matches
    part by part as `glob.glob` does. A file no entry matches gets the analysis
    defaults.
    """
    parts = Path(path).parts
    for entry in sources:
        if _is_database(entry):
            continue
        pattern = Path(_entry_path(entry)).parts
        if len(pattern) == len(parts) and all(
            fnmatch.fnmatchcase(p, q) for p, q in zip(parts, pattern, strict=True)
        ):
            return SourceSpec(Path(path), **_entry_options(entry, csv))
    return SourceSpec(Path(path), **_entry_options("", csv))


def source_specs(
    sources: tuple[Any, ...] | list[Any], csv: Mapping[str, Any], *, analysis: str
) -> list[SourceSpec | DatabaseSpec]:
    """Every source in reading order: a file with its options, or a database query.

    A file's options are the analysis defaults, overridden by its entry's.
    """
    specs: list[SourceSpec | DatabaseSpec] = []
    for item in source_entries(sources, analysis=analysis):
        if isinstance(item, DatabaseSpec):
            specs.append(item)
        else:
            specs.append(SourceSpec(item[0], **_entry_options(item[1], csv)))
    return specs
