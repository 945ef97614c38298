"""Load featpipe.yaml, term files and model specs into plain dataclasses.

Every field of the project file and of a spec is read and checked here; an unknown key is an error naming the key, the
file and the line. SQL inside the files is only carried along: the compiler parses it.
"""

from __future__ import annotations

import datetime
import difflib
import os
import re
from dataclasses import dataclass, field
from pathlib import Path

from sqlglot import exp
from sqlglot.errors import ParseError

from ..errors import Diagnostic, FeatpipeError, raise_if_errors
from .names import NAME_PATTERN, NAME_RULE, scoring_clash
from .yamlfile import YamlDocument, read_text, read_yaml

PROJECT_FILE = "featpipe.yaml"
LINKS = {"binomial": "logit", "poisson": "log", "gaussian": "identity", "gamma": "log", "tweedie": "log",
         "quasipoisson": "log", "quasibinomial": "logit"}  # each GLM family with its link
FAMILIES = tuple(LINKS)
ENGINE_KINDS = ("duckdb", "postgres", "spark")
EXPECTATIONS = ("positive", "negative")
WEIGHT_KINDS = ("variance", "frequency")  # a bare `weights: column` is a variance weight


@dataclass(frozen=True)
class EngineConfig:
    kind: str = "duckdb"
    path: Path | None = None  # duckdb database file (absolute)
    dsn: str | None = None  # postgres connection string, with ${VAR} already expanded
    url: str | None = None  # spark connect URL; None means a local session
    master: str = "local[2]"  # spark master for a local session
    database: str | None = None  # spark database (schema) for tables


@dataclass(frozen=True)
class InputSpec:
    name: str
    key: str
    columns: dict[str, str]  # column name -> declared SQL type, as written
    load: Path | None = None  # absolute path of a CSV or Parquet file


@dataclass(frozen=True)
class TermFile:
    path: Path  # absolute
    display: str  # path relative to the project root, used in diagnostics
    text: str


CROSS_VALIDATED = "cv"  # `penalty: {l2: cv}`: the l2 strength is chosen by cross-validated deviance
DEFAULT_FOLDS = 5  # folds for `l2: cv` when the spec sets none (common practice)


@dataclass(frozen=True)
class Penalty:
    l2: float = 0.0
    l1: float = 0.0
    cross_validated: bool = False  # l2 is chosen at fit time on a grid (l2 itself is then 0 here)

    @property
    def active(self) -> bool:
        return self.l1 > 0 or self.l2 > 0 or self.cross_validated

    def record(self) -> dict:
        """The penalty as the spec states it, for the fit's dependencies and the fitted file."""
        return {"l2": CROSS_VALIDATED if self.cross_validated else self.l2, "l1": self.l1}


@dataclass(frozen=True)
class Holdout:
    """The rows a fit holds out: a share `fraction` chosen by a salted hash of the key or, out of
    time, every row whose `column` is on or after `start` (an ISO date text or a number). The salt
    also assigns cross-validation folds."""

    fraction: float = 0.3
    salt: str = "v1"
    column: str | None = None
    start: str | float | None = None

    @property
    def out_of_time(self) -> bool:
        return self.column is not None

    def record(self) -> dict:
        """The holdout as the fitted file records it (`from` for `start`, as the spec writes it)."""
        if self.out_of_time:
            return {"column": self.column, "from": self.start, "salt": self.salt}
        return {"fraction": self.fraction, "salt": self.salt}

    @classmethod
    def from_record(cls, record: dict) -> Holdout:
        if "column" in record:
            return cls(0.0, record["salt"], record["column"], record["from"])
        return cls(record["fraction"], record["salt"])


@dataclass(frozen=True)
class ModelSpec:
    name: str
    display: str  # specs/NAME.yaml
    input: str
    target: str
    family: str
    terms: tuple[str, ...]
    offset: str | None = None
    weights: str | None = None  # the weight column
    penalty: Penalty = Penalty()
    holdout: Holdout = Holdout()
    folds: int = 0  # k-fold cross-validation on the training rows; 0: none
    threshold: float = 0.5
    expect: dict[str, str] = field(default_factory=dict)
    step: dict[str, float] = field(default_factory=dict)
    notes: dict[str, str] = field(default_factory=dict)
    max_dropped: float = 0.05  # largest share of rows that may be dropped for NULLs before a fit refuses
    weight_kind: str = "variance"  # "frequency": a row stands for `weights` identical rows
    power: float | None = None  # the tweedie variance power, in (1, 2)
    errors: str = "model"  # "model", "robust" (sandwich, HC1) or "cluster" (sandwich over clusters of `cluster`)
    cluster: str | None = None  # the column whose values group rows into clusters, with errors: cluster
    trials: str | None = None  # binomial successes (the target) out of this many trials per row
    groups: tuple[str, ...] = ()  # input columns whose groups the report tabulates; never terms
    document: YamlDocument | None = field(default=None, compare=False, repr=False)

    def at(self, path: tuple, message: str, **kwargs) -> Diagnostic:
        """A diagnostic pointing into this spec's file."""
        if self.document is None:
            return Diagnostic(self.display, 1, 1, message, kwargs.get("severity", "error"))
        return self.document.at(path, message, **kwargs)


@dataclass(frozen=True)
class Project:
    root: Path
    name: str
    engine: EngineConfig
    inputs: dict[str, InputSpec]
    term_files: tuple[TermFile, ...]
    models: dict[str, ModelSpec]
    document: YamlDocument | None = field(default=None, compare=False, repr=False)
    problems: tuple[Diagnostic, ...] = ()  # errors in specs or term files, kept for `check` (see load_project)

    @property
    def build_dir(self) -> Path:
        return self.root / "build"

    def fitted_path(self, model: str) -> Path:
        return self.root / "fitted" / f"{model}.yaml"


def find_project_root(start: Path | None = None) -> Path:
    """The nearest folder upward from `start` (default: the working folder) holding featpipe.yaml."""
    here = (start or Path.cwd()).resolve()
    if here.is_file():
        here = here.parent
    for folder in (here, *here.parents):
        if (folder / PROJECT_FILE).is_file():
            return folder
    raise FeatpipeError(
        f"no {PROJECT_FILE} in {here} or any folder above it; pass --project PATH or run `featpipe new PATH`"
    )


def load_project(path: Path | str | None = None, *, partial: bool = False) -> Project:
    """Read a project folder (or the nearest one above `path`); all problems are raised at once.

    With `partial` (for `check`), errors in specs and term files are kept in `problems` instead, with
    the specs that could be read, so the compiler reports its own errors of the same run beside them
    and raises them all; errors in featpipe.yaml are raised at once either way.
    """
    root = find_project_root(Path(path) if path is not None else None)
    diagnostics: list[Diagnostic] = []
    document = read_yaml(root / PROJECT_FILE, PROJECT_FILE)
    data = _mapping(document, (), diagnostics)
    _unknown_keys(document, (), data, {"name", "engine", "inputs"}, diagnostics)
    name = data.get("name") or root.name
    if not isinstance(name, str):
        diagnostics.append(document.at(("name",), "name must be a text"))
        name = root.name
    engine = _engine(document, data.get("engine") or {}, root, name, diagnostics)
    inputs = _inputs(document, data.get("inputs"), root, diagnostics)
    term_files = []
    for file in sorted((root / "terms").glob("*.sql")):
        display = file.relative_to(root).as_posix()
        try:
            term_files.append(TermFile(file, display, read_text(file, display)))
        except FeatpipeError as error:  # not UTF-8 or too large; keep checking the other files
            diagnostics.extend(error.diagnostics)
    models = {}
    for file in sorted((root / "specs").glob("*.yaml")):
        try:
            model = _model(file, root, inputs, diagnostics)
        except FeatpipeError as error:  # a YAML syntax error in one spec; keep checking the others
            diagnostics.extend(error.diagnostics)
            continue
        if model is not None:
            models[model.name] = model
    errors = [d for d in diagnostics if d.severity == "error"]
    if not partial or any(d.file == PROJECT_FILE for d in errors):
        raise_if_errors(diagnostics)
    return Project(root, name, engine, inputs, tuple(term_files), models, document, tuple(errors))


def _mapping(document: YamlDocument, path: tuple, diagnostics: list[Diagnostic]) -> dict:
    value = document.data
    for part in path:
        value = value.get(part) if isinstance(value, dict) else None
    if value is None:
        return {}
    if not isinstance(value, dict):
        diagnostics.append(document.at(path, f"expected a mapping of keys to values at '{'.'.join(map(str, path)) or 'top level'}'"))
        return {}
    return value


def _unknown_keys(document, path, data: dict, allowed: set[str], diagnostics) -> None:
    for key in data:
        if key not in allowed:
            hint = difflib.get_close_matches(str(key), sorted(allowed), n=1)
            suggestion = f"; did you mean '{hint[0]}'?" if hint else f"; allowed keys: {', '.join(sorted(allowed))}"
            diagnostics.append(document.at(path + (key,), f"unknown key '{key}'{suggestion}", key=True))


def expand_environment(text: str, document: YamlDocument, path: tuple, diagnostics) -> str:
    """Replace ${VAR} with the environment's value, so secrets stay out of project files."""

    def value(match: re.Match) -> str:
        variable = match.group(1)
        if variable not in os.environ:
            diagnostics.append(document.at(path, f"environment variable {variable} is not set; export it before running"))
            return ""
        return os.environ[variable]

    return re.sub(r"\$\{([A-Za-z_][A-Za-z0-9_]*)\}", value, text)


def _engine(document, data, root: Path, name: str, diagnostics) -> EngineConfig:
    if not isinstance(data, dict):
        diagnostics.append(document.at(("engine",), "engine must be a mapping with at least 'kind'"))
        return EngineConfig(path=root / "build" / f"{name}.duckdb")
    _unknown_keys(document, ("engine",), data, {"kind", "path", "dsn", "url", "master", "database"}, diagnostics)
    kind = data.get("kind", "duckdb")
    if kind not in ENGINE_KINDS:
        diagnostics.append(document.at(("engine", "kind"), f"unknown engine kind '{kind}'; use one of {', '.join(ENGINE_KINDS)}"))
        kind = "duckdb"
    for setting in ("path", "dsn", "url", "master", "database"):
        if setting in data and not isinstance(data[setting], str):
            diagnostics.append(document.at(("engine", setting), f"engine {setting} must be a text, not {type(data[setting]).__name__}"))
            data = {key: value for key, value in data.items() if key != setting}
    if "database" in data and not _is_name(data["database"]):
        diagnostics.append(document.at(("engine", "database"), f"engine database {data['database']!r} {NAME_RULE}; it names a schema in SQL"))
    path = Path(data.get("path") or f"build/{name}.duckdb")
    dsn = data.get("dsn")
    if dsn is not None:
        dsn = expand_environment(str(dsn), document, ("engine", "dsn"), diagnostics)
    url = data.get("url")
    if url is not None:
        url = expand_environment(str(url), document, ("engine", "url"), diagnostics)
    return EngineConfig(
        kind=kind,
        path=path if path.is_absolute() else root / path,
        dsn=dsn,
        url=url,
        master=str(data.get("master", "local[2]")),
        database=data.get("database"),
    )


def _inputs(document, data, root: Path, diagnostics) -> dict[str, InputSpec]:
    if not isinstance(data, dict) or not data:
        diagnostics.append(document.at(("inputs",), "the project declares no inputs; add 'inputs:' with a key and columns"))
        return {}
    inputs = {}
    for input_name, spec in data.items():
        path = ("inputs", input_name)
        if not _is_name(input_name):
            diagnostics.append(document.at(path, f"input name {input_name!r} {NAME_RULE}; it names a table in SQL", key=True))
        if not isinstance(spec, dict):
            diagnostics.append(document.at(path, f"input '{input_name}' must be a mapping with 'key' and 'columns'"))
            continue
        _unknown_keys(document, path, spec, {"key", "load", "columns"}, diagnostics)
        columns = spec.get("columns")
        if not isinstance(columns, dict) or not columns:
            diagnostics.append(document.at(path + ("columns",), f"input '{input_name}' needs 'columns:' mapping each column to its SQL type"))
            columns = {}
        for column in columns:
            if not _is_name(column):
                diagnostics.append(document.at(path + ("columns", column), f"column name {column!r} {NAME_RULE}", key=True))
        columns = {str(column): str(kind) for column, kind in columns.items()}
        for column, kind in columns.items():
            if not is_sql_type(kind):
                diagnostics.append(document.at(path + ("columns", column), f"{kind!r} is not a SQL type (for example BIGINT, DOUBLE, VARCHAR, BOOLEAN)"))
        key = spec.get("key")
        if not key:
            diagnostics.append(document.at(path, f"input '{input_name}' needs 'key:', the column that identifies a row", key=True))
        elif not isinstance(key, str):
            diagnostics.append(document.at(path + ("key",), f"key must name one column (e.g. key: {next(iter(columns), 'id')}), "
                                           f"not {type(key).__name__} {key!r}"))
            key = None
        elif key not in columns:
            diagnostics.append(document.at(path + ("key",), f"key '{key}' is not among the columns of '{input_name}'"))
        elif scoring_clash(str(key)):
            diagnostics.append(document.at(path + ("key",), f"key '{key}' {scoring_clash(str(key))}; "
                                           "key the input by another column, or by a view that renames this one"))
        load = spec.get("load")
        if load is not None:  # relative to the project; absolute and ~ paths reach shared data elsewhere
            load = root / Path(str(load)).expanduser()
            if load.suffix.lower() not in (".csv", ".parquet"):
                diagnostics.append(document.at(path + ("load",), "load must be a .csv or .parquet file"))
            elif load.is_dir():
                diagnostics.append(document.at(path + ("load",), f"{spec['load']} is a directory; point load at one .csv or .parquet file"))
            elif not load.is_file():
                diagnostics.append(document.at(path + ("load",), f"file {spec['load']} does not exist"))
        inputs[str(input_name)] = InputSpec(str(input_name), str(key or ""), columns, load)
    return inputs


def _is_name(value) -> bool:
    return isinstance(value, str) and NAME_PATTERN.match(value) is not None


# A column type as written: words, then optional (n) or (p, s): BIGINT, DOUBLE PRECISION, DECIMAL(10, 2).
TYPE_FORM = re.compile(r"[A-Za-z][A-Za-z0-9_]*(?: [A-Za-z][A-Za-z0-9_]*)*(?: ?\( *[0-9]+ *(?:, *[0-9]+ *)?\))?")


def is_sql_type(kind: str) -> bool:
    """A plain SQL type DuckDB knows; anything more (`VARCHAR); DROP ...`) is refused, not half-parsed."""
    if not TYPE_FORM.fullmatch(kind):
        return False
    try:
        return exp.DataType.build(kind, dialect="duckdb").this != exp.DataType.Type.USERDEFINED
    except (ParseError, ValueError):
        return False


MODEL_KEYS = {
    "input", "target", "family", "offset", "weights", "terms", "penalty",
    "holdout", "folds", "threshold", "expect", "step", "notes", "max_dropped", "power", "errors", "trials",
    "groups",
}
MAX_FOLDS = 20


def _model(file: Path, root: Path, inputs: dict[str, InputSpec], diagnostics) -> ModelSpec | None:
    display = file.relative_to(root).as_posix()
    document = read_yaml(file, display)
    name = file.stem
    if not NAME_PATTERN.match(name):
        diagnostics.append(Diagnostic(display, 1, 1, f"model name '{name}' must start with a letter and hold only letters, digits and _"))
    data = _mapping(document, (), diagnostics)
    if not data:
        diagnostics.append(Diagnostic(display, 1, 1, "empty model spec; give at least input, target, family and terms"))
        return None
    _unknown_keys(document, (), data, MODEL_KEYS, diagnostics)
    before = len(diagnostics)

    def required(key: str) -> str:
        value = data.get(key)
        if value in (None, ""):
            diagnostics.append(Diagnostic(display, 1, 1, f"missing required key '{key}'"))
            return ""
        if not isinstance(value, str):
            diagnostics.append(document.at((key,), f"'{key}' must be one text, not {type(value).__name__} {value!r}"))
            return ""
        return value

    input_name, target, family = required("input"), required("target"), required("family")
    if input_name and input_name not in inputs:
        hint = difflib.get_close_matches(input_name, list(inputs), n=1)
        diagnostics.append(document.at(("input",), f"unknown input '{input_name}'" + (f"; did you mean '{hint[0]}'?" if hint else "")))
    if family and family not in FAMILIES:
        diagnostics.append(document.at(("family",), f"unknown family '{family}'; use one of {', '.join(FAMILIES)}"))
    power = _power(document, family, data.get("power"), diagnostics)
    columns = inputs[input_name].columns if input_name in inputs else {}
    if target and columns and target not in columns:
        diagnostics.append(document.at(("target",), f"target '{target}' is not a column of input '{input_name}'"))
    weights, weight_kind = _weights(document, data.get("weights"), diagnostics)
    if weights is not None and columns and weights not in columns:
        diagnostics.append(document.at(("weights",), f"weights column '{weights}' is not a column of input '{input_name}'"))
    errors, cluster = _errors(document, data.get("errors", "model"), columns, input_name, diagnostics)
    trials = data.get("trials")
    if trials is not None:
        if not isinstance(trials, str) or (columns and trials not in columns):
            diagnostics.append(document.at(("trials",), f"trials must name the column of input '{input_name}' holding each "
                                                        f"row's number of trials, not {trials!r}"))
        elif family != "binomial":
            diagnostics.append(document.at(("trials",), f"trials count binomial successes out of trials; family is {family}: "
                                                        "use family: binomial (or drop trials)"))
        elif weights is not None:
            diagnostics.append(document.at(("trials",), "trials are the binomial weights already; drop weights"))
        elif data.get("folds") or data.get("penalty"):
            diagnostics.append(document.at(("trials",), "trials do not go with folds or a penalty yet: fit the grouped "
                                                        "model without them"))
    offset = data.get("offset")
    if offset is not None and not isinstance(offset, str):
        diagnostics.append(document.at(("offset",), "offset must be a SQL expression, e.g. LN(exposure_years)"))
        offset = None

    terms = data.get("terms")
    if not isinstance(terms, list) or not terms or not all(isinstance(t, str) for t in terms):
        diagnostics.append(document.at(("terms",), "terms must be a non-empty list of term or column names"))
        terms = []
    for index, term in enumerate(terms):
        if term in terms[:index]:
            diagnostics.append(document.at(("terms", index), f"term '{term}' is listed twice"))

    penalty_data = data.get("penalty") or {}
    penalty = Penalty()
    if isinstance(penalty_data, dict):
        _unknown_keys(document, ("penalty",), penalty_data, {"l1", "l2"}, diagnostics)
        cross_validated = penalty_data.get("l2") == CROSS_VALIDATED
        penalty = Penalty(
            l2=0.0 if cross_validated else _number(document, ("penalty", "l2"), penalty_data.get("l2", 0.0), diagnostics, minimum=0.0),
            l1=_number(document, ("penalty", "l1"), penalty_data.get("l1", 0.0), diagnostics, minimum=0.0),
            cross_validated=cross_validated,
        )
    else:
        diagnostics.append(document.at(("penalty",), "penalty must be a mapping like {l2: 0.1, l1: 0.0}"))

    holdout_data = data.get("holdout") or {}
    holdout = Holdout()
    if isinstance(holdout_data, dict):
        _unknown_keys(document, ("holdout",), holdout_data, {"fraction", "salt", "column", "from"}, diagnostics)
        if "column" in holdout_data or "from" in holdout_data:
            holdout = _out_of_time(document, holdout_data, columns, input_name, diagnostics)
        else:
            fraction = _number(document, ("holdout", "fraction"), holdout_data.get("fraction", 0.3), diagnostics, minimum=0.0)
            if not 0.0 <= fraction < 1.0:
                diagnostics.append(document.at(("holdout", "fraction"), "holdout fraction must be at least 0 and below 1"))
            holdout = Holdout(fraction, str(holdout_data.get("salt", "v1")))
    else:
        diagnostics.append(document.at(("holdout",), "holdout must be a mapping like {fraction: 0.3, salt: v1}"))

    folds = data.get("folds", DEFAULT_FOLDS if penalty.cross_validated else 0)
    if isinstance(folds, bool) or not isinstance(folds, int) or not (folds == 0 or 2 <= folds <= MAX_FOLDS):
        diagnostics.append(document.at(("folds",), f"folds must be a whole number from 2 to {MAX_FOLDS} (or 0 for none), not {folds!r}"))
        folds = 0
    elif penalty.cross_validated and folds == 0:
        diagnostics.append(document.at(("folds",), "penalty l2: cv chooses the strength by cross-validation; set folds to 2 or more"))

    threshold = _number(document, ("threshold",), data.get("threshold", 0.5), diagnostics)
    if not 0.0 < threshold < 1.0:
        diagnostics.append(document.at(("threshold",), "threshold must lie strictly between 0 and 1"))
    max_dropped = _number(document, ("max_dropped",), data.get("max_dropped", 0.05), diagnostics, minimum=0.0)

    expect = _term_map(document, "expect", data, terms, diagnostics)
    for term, sign in expect.items():
        if sign not in EXPECTATIONS:
            diagnostics.append(document.at(("expect", term), f"expected sign must be 'positive' or 'negative', not '{sign}'"))
    step = {
        term: _number(document, ("step", term), value, diagnostics)
        for term, value in _term_map(document, "step", data, terms, diagnostics).items()
    }
    for term, value in step.items():
        if value == 0:
            diagnostics.append(document.at(("step", term), "a step must not be zero"))
    notes = {term: str(value) for term, value in _term_map(document, "notes", data, terms, diagnostics).items()}
    if errors != "model" and penalty.active:
        diagnostics.append(document.at(("errors",), "a penalized fit has no Wald inference, robust or not: "
                                                    "drop errors or the penalty"))
    if errors == "robust" and weight_kind == "frequency":
        diagnostics.append(document.at(("errors",), "errors: robust sums each row's own score, but a frequency-weighted row "
                                                    "stands for several rows: use errors: {cluster: c} with a column "
                                                    "that groups them, or variance weights"))
    groups = _groups(document, data.get("groups"), columns, input_name, target, diagnostics)

    if len(diagnostics) > before:
        return None
    return ModelSpec(
        name=name, display=display, input=input_name, target=target, family=family, terms=tuple(terms),
        offset=offset, weights=weights, penalty=penalty, holdout=holdout, folds=folds, threshold=threshold,
        expect=expect, step=step, notes=notes, max_dropped=max_dropped, weight_kind=weight_kind, power=power, document=document,
        errors=errors, cluster=cluster, trials=trials, groups=groups,
    )


def _groups(document, data, columns: dict[str, str], input_name: str, target: str, diagnostics) -> tuple[str, ...]:
    """`groups: [column, ...]`: distinct input columns other than the target, whose groups are tabulated."""
    if data is None:
        return ()
    if not isinstance(data, list) or not all(isinstance(name, str) for name in data):
        diagnostics.append(document.at(("groups",), "groups must be a list of input column names, e.g. [region]"))
        return ()
    for index, name in enumerate(data):
        if columns and name not in columns:
            diagnostics.append(document.at(("groups", index), f"group column '{name}' is not a column of input '{input_name}'"))
        elif name == target:
            diagnostics.append(document.at(("groups", index), f"'{name}' is the model's target; it cannot also be a group column"))
        elif name in data[:index]:
            diagnostics.append(document.at(("groups", index), f"group column '{name}' is listed twice"))
    return tuple(data)


def _out_of_time(document, data: dict, columns: dict[str, str], input_name: str, diagnostics) -> Holdout:
    """`holdout: {column: c, from: v}`: rows with c on or after v are held out; c a date or number column."""
    if "fraction" in data:
        diagnostics.append(document.at(("holdout", "fraction"), "holdout takes either fraction (a random share of rows) "
                                       "or column and from (out of time), not both; remove one", key=True))
    name, start = data.get("column"), data.get("from")
    if not isinstance(name, str) or start is None:
        diagnostics.append(document.at(("holdout",), "an out-of-time holdout needs both column and from, "
                                       "e.g. {column: signed_on, from: 2025-07-01}"))
        return Holdout()
    salt = str(data.get("salt", "v1"))
    if not columns:
        return Holdout(0.0, salt, name, None)
    if name not in columns:
        hint = difflib.get_close_matches(name, list(columns), n=1)
        diagnostics.append(document.at(("holdout", "column"), f"holdout column '{name}' is not a column of input '{input_name}'"
                                       + (f"; did you mean '{hint[0]}'?" if hint else "")))
        return Holdout()
    declared = exp.DataType.build(columns[name], dialect="duckdb")
    if declared.is_type(*exp.DataType.TEMPORAL_TYPES):
        if isinstance(start, str):
            try:
                start = datetime.date.fromisoformat(start)
            except ValueError:
                pass
        if not isinstance(start, datetime.date) or isinstance(start, datetime.datetime):
            diagnostics.append(document.at(("holdout", "from"), f"holdout from must be a date like 2025-07-01 for the "
                                           f"{columns[name]} column '{name}', not {start!r}"))
            return Holdout()
        return Holdout(0.0, salt, name, start.isoformat())
    if declared.is_type(*exp.DataType.NUMERIC_TYPES):
        if isinstance(start, bool) or not isinstance(start, (int, float)):
            diagnostics.append(document.at(("holdout", "from"), f"holdout from must be a number for the "
                                           f"{columns[name]} column '{name}', not {start!r}"))
            return Holdout()
        return Holdout(0.0, salt, name, float(start))
    diagnostics.append(document.at(("holdout", "column"), f"holdout column '{name}' is {columns[name]}; an out-of-time "
                                   "holdout needs a date, timestamp or numeric column"))
    return Holdout()


def _power(document, family: str, value, diagnostics) -> float | None:
    """The tweedie variance power: required with family tweedie, strictly between 1 (poisson) and 2 (gamma)."""
    if family != "tweedie":
        if value is not None:
            diagnostics.append(document.at(("power",), f"power is the tweedie variance power; family {family} takes none, "
                                           "remove it", key=True))
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 1.0 < value < 2.0:
        diagnostics.append(document.at(("power",) if value is not None else ("family",), "family tweedie needs power: a "
                                       "number strictly between 1 (poisson) and 2 (gamma), e.g. power: 1.5"
                                       + ("" if value is None else f", not {value!r}")))
        return None
    return float(value)


def _weights(document, value, diagnostics) -> tuple[str | None, str]:
    """The weight column and its kind from `weights: column` (a variance weight) or
    `weights: {column: c, kind: frequency|variance}`."""
    if value is None or isinstance(value, str):
        return value, "variance"
    if not isinstance(value, dict):
        diagnostics.append(document.at(("weights",), f"weights must name one column or be {{column: c, kind: frequency}}, "
                                                     f"not {type(value).__name__} {value!r}"))
        return None, "variance"
    _unknown_keys(document, ("weights",), value, {"column", "kind"}, diagnostics)
    column, kind = value.get("column"), value.get("kind", "variance")
    if not isinstance(column, str):
        diagnostics.append(document.at(("weights",), "weights needs 'column:', the column holding the weight"))
        column = None
    if kind not in WEIGHT_KINDS:
        diagnostics.append(document.at(("weights", "kind"), f"weights kind must be frequency (a row stands for that many "
                                                            f"identical rows) or variance (a precision weight), not {kind!r}"))
        kind = "variance"
    return column, kind


def _errors(document, value, columns: dict[str, str], input_name: str, diagnostics) -> tuple[str, str | None]:
    """The standard errors asked for: `errors: model` (the default), `errors: robust` or `errors: {cluster: c}`."""
    if value in ("model", "robust"):
        return value, None
    if isinstance(value, dict):
        _unknown_keys(document, ("errors",), value, {"cluster"}, diagnostics)
        name = value.get("cluster")
        if not isinstance(name, str):
            diagnostics.append(document.at(("errors",), "errors: {cluster: c} needs the column whose values group the rows"))
        elif columns and name not in columns:
            diagnostics.append(document.at(("errors", "cluster"), f"cluster column '{name}' is not a column of input '{input_name}'"))
        else:
            return "cluster", name
        return "model", None
    diagnostics.append(document.at(("errors",), f"errors must be model, robust (sandwich standard errors) or {{cluster: column}}, "
                                                f"not {value!r}"))
    return "model", None


def _term_map(document, key: str, data: dict, terms: list[str], diagnostics) -> dict:
    value = data.get(key) or {}
    if not isinstance(value, dict):
        diagnostics.append(document.at((key,), f"'{key}' must map term names to values"))
        return {}
    for term in value:
        if term not in terms:
            diagnostics.append(document.at((key, term), f"'{term}' in {key} is not one of the model's terms", key=True))
    return {term: item for term, item in value.items() if term in terms}


def _number(document, path: tuple, value, diagnostics, minimum: float | None = None) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        diagnostics.append(document.at(path, f"'{path[-1]}' must be a number, not {value!r}"))
        return 0.0
    if minimum is not None and value < minimum:
        diagnostics.append(document.at(path, f"'{path[-1]}' must be at least {minimum:g}"))
    return float(value)
