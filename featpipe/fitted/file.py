"""The fitted file `fitted/MODEL.yaml`: dataclasses, deterministic YAML, atomic writes, staleness.

The file is reviewed as a diff, so the same definitions and data must give the same bytes: keys
keep a fixed order and every float that comes from a sum is written with 12 significant digits.
Engines add up floating point sums in parallel in no fixed order, so the last few of a double's 17
digits can differ from run to run; 12 digits keep every figure far beyond its statistical precision
while making the file repeatable (coefficients agree with reference fits to about 1e-12, and scoring
uses exactly the digits written here). Order statistics (bin edges, min, median, max) are data
values, exact on every run, and are written in full so a value on an edge stays in its bin.
"""

from __future__ import annotations

import hashlib
from dataclasses import asdict, dataclass, field
from pathlib import Path

import yaml

from ..atomic import write_text_atomic
from ..compiler import CompiledModel
from ..errors import FeatpipeError
from ..project import InputSpec
from ..project.yamlfile import read_text
from ..sqlgen.profile import Profile
from .learned import check_learned_columns, data_staleness
from .validate import AGAIN, FORMAT_VERSION, check_integrity, check_values


@dataclass(frozen=True)
class Effect:
    kind: str  # "odds ratio", "rate ratio" or "difference"
    step: float
    value: float
    low: float | None
    high: float | None
    basis: str = "step"  # where the step comes from: "step" (the spec), "sd" (one training sd), "indicator" (1 rather than 0)


@dataclass(frozen=True)
class FittedTerm:
    name: str
    estimate: float | None
    std_error: float | None
    statistic: float | None
    p_value: float | None
    ci_low: float | None
    ci_high: float | None
    fingerprint: str | None = None  # None for the intercept
    sql: str | None = None  # canonical SQL over input columns
    kind: str = "intercept"  # "intercept", "numeric" or "boolean"
    doc: str = ""
    columns: tuple[str, ...] = ()
    built_from: tuple[str, ...] = ()
    effect: Effect | None = None
    vif: float | None = None
    profile: Profile | None = None
    notes: tuple[str, ...] = ()
    # A learned term's constants, one entry per design column and its joint Wald test (fitting/learned.py);
    # a term of several columns has no single estimate (None).
    learned: dict | None = None


@dataclass(frozen=True)
class FittedModel:
    model: str
    fingerprint: str
    input: str
    key: str
    target: str
    family: str
    link: str
    offset: str | None
    weights: str | dict | None  # the column (a variance weight) or {column: c, kind: frequency}
    holdout: dict
    threshold: float
    penalty: dict
    columns: dict  # declared SQL type of the key and of every input column the terms and offset read
    rows: dict  # input, complete, train, holdout, dropped {reason: count}
    fit: dict  # converged, iterations, deviance, null_deviance, log_likelihood, aic, bic, ...
    terms: tuple[FittedTerm, ...]  # the intercept first
    linear_predictor: Profile | None = None
    metrics: dict = field(default_factory=dict)
    crossval: dict = field(default_factory=dict)  # k-fold cross-validation (featpipe.fitting.crossval); empty without folds
    input_profiles: dict = field(default_factory=dict)  # featpipe.fitting.inputs: NULLs and text levels of the columns read
    group_tables: dict = field(default_factory=dict)  # featpipe.fitting.groups tables on the holdout; empty without groups
    warnings: tuple[str, ...] = ()
    depends_on: dict = field(default_factory=dict)  # compiler.fit_dependencies at the fit, to name what changed since
    format: int = FORMAT_VERSION

    @property
    def coefficients(self) -> dict[str, float]:
        return {term.name: term.estimate for term in self.terms}

    @property
    def weight_column(self) -> str | None:
        return self.weights["column"] if isinstance(self.weights, dict) else self.weights

    @property
    def model_terms(self) -> tuple[FittedTerm, ...]:
        """The terms after the intercept, in model order."""
        return self.terms[1:]

    def term(self, name: str) -> FittedTerm:
        for term in self.terms:
            if term.name == name:
                return term
        raise KeyError(name)


def to_yaml(fitted: FittedModel) -> str:
    data = asdict(fitted)
    if not data["crossval"]:
        del data["crossval"]  # a fit without folds writes the file it always did
    for term in data["terms"]:  # only a learned term has the key: other fits keep their bytes
        if term["learned"] is None:
            del term["learned"]
    if not data["group_tables"]:
        del data["group_tables"]  # so does a fit without groups
    if not data["input_profiles"]:
        del data["input_profiles"]  # files fitted before input profiles were recorded read back the same
    return dump_record(data)


def dump_record(data: dict) -> str:
    """A record featpipe writes (fitted file, evaluation, drift history) as plain, repeatable YAML."""
    return yaml.safe_dump(_plain(data), sort_keys=False, allow_unicode=True, width=100)


SIGNIFICANT_DIGITS = 12
ORDER_STATISTICS = {"edges", "min", "median", "max"}
# Written in full too: the spec's own values, compared with the spec when the fit goes stale.
WRITTEN_IN_FULL = ORDER_STATISTICS | {"depends_on", "values"}  # values: a learned term's edges, knots or caps


def as_written(value: float) -> float:
    """`value` at the precision the fitted file keeps for figures computed from sums."""
    return float(f"{value:.{SIGNIFICANT_DIGITS}g}")


def _plain(value, exact: bool = False):
    """Tuples to lists and summed floats to 12 significant digits, recursively: plain, repeatable YAML."""
    if isinstance(value, float) and not exact:
        return as_written(value)
    if isinstance(value, dict):
        return {key: _plain(item, exact or key in WRITTEN_IN_FULL) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(item, exact) for item in value]
    return value


# libyaml's parser reads a fitted file several times faster than PyYAML's own (`check` reads them all);
# the safe constructor is the same either way.
SAFE_LOADER = getattr(yaml, "CSafeLoader", yaml.SafeLoader)


def from_yaml(text: str, source: str) -> FittedModel:
    """The fitted model in `text`, every value checked before use and refused if edited by hand
    (featpipe.fitted.validate); `source` names the file in messages."""
    data = load_record(text, source, "a fitted file")
    check_values(data, source)
    check_learned_columns(data, text, source)
    fitted = FittedModel(**{
        **data,
        "terms": tuple(_term(item) for item in data["terms"]),
        "linear_predictor": _profile(data.get("linear_predictor")),
        "warnings": tuple(data.get("warnings") or ()),
    })
    check_integrity(fitted, source)
    return fitted


def load_record(text: str, source: str, what: str, again: str = AGAIN):
    """The YAML in `text`, refused with the line of a syntax error; `what` names the kind of file
    ("a fitted file"), `source` the file and `again` what to do, in messages."""
    try:
        return yaml.load(text, Loader=SAFE_LOADER)
    except yaml.YAMLError as error:
        mark = getattr(error, "problem_mark", None)
        where = f"YAML error at line {mark.line + 1}" if mark else "YAML error"
        problem = getattr(error, "problem", None) or str(error).splitlines()[0]
        raise FeatpipeError(f"{source}: not {what} featpipe can read ({where}: {problem}); {again}") from None
    except RecursionError:
        raise FeatpipeError(f"{source}: not {what} featpipe can read (nested too deeply); {again}") from None


def _profile(data: dict | None) -> Profile | None:
    if data is None:
        return None
    return Profile(**{**data, "edges": tuple(data["edges"]), "shares": tuple(data["shares"])})


def _term(data: dict) -> FittedTerm:
    effect = Effect(**data["effect"]) if data.get("effect") else None
    return FittedTerm(**{
        **data,
        "columns": tuple(data.get("columns") or ()),
        "built_from": tuple(data.get("built_from") or ()),
        "notes": tuple(data.get("notes") or ()),
        "effect": effect,
        "profile": _profile(data.get("profile")),
    })


def write_fitted(path: Path, fitted: FittedModel) -> FittedModel:
    """Write atomically and return the model as written (floats at the file's precision); a model whose
    file featpipe would refuse to read is not written."""
    text = to_yaml(fitted)
    written = from_yaml(text, _source(path))
    write_text_atomic(path, text)
    return written


def read_fitted(path: Path) -> FittedModel:
    if not path.is_file():
        raise FeatpipeError(f"{path.name}: no fitted file at {path}; run `featpipe fit` first")
    return from_yaml(read_text(path, _source(path)), _source(path))


def _source(path: Path) -> str:
    """The file as messages name it: fitted/NAME.yaml."""
    return f"{path.parent.name}/{path.name}"


def file_hash(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()[:16]


OLDER_FILE = "the file does not record all the fit depended on (an older featpipe wrote it); fit it again to record it"


def staleness(fitted: FittedModel, model: CompiledModel | None, inputs: dict[str, InputSpec] | None = None) -> list[str]:
    """Why a fitted model no longer matches its current definitions (empty when it is current);
    `model` None: its spec is gone. Given the project's `inputs`, a model with learned terms is also
    stale when its input's data file changed since the fit (fitted.learned.data_staleness).

    Each reason names what changed between the dependencies recorded in the file (`depends_on`) and
    the model's now. A file written before featpipe recorded them still names its terms' changes,
    since every fitted term carries its fingerprint.
    """
    if model is None:
        return [f"specs/{fitted.model}.yaml no longer exists"]
    data = data_staleness(fitted, inputs) if inputs is not None else []
    if fitted.fingerprint == model.fingerprint:
        return data
    recorded = fitted.depends_on or {"terms": {term.name: term.fingerprint for term in fitted.terms if term.fingerprint}}
    reasons = [reason for key, now in model.dependencies.items() if key in recorded and not _same(recorded[key], now)
               for reason in _changes(key, recorded[key], now)]
    # Dependencies recorded only when set: one set or unset is a change, not an older file.
    reasons += [f"{key} changed from {_shown(recorded.get(key))} to {_shown(model.dependencies.get(key))}"
                for key in WHEN_SET if (key in recorded) != (key in model.dependencies) and fitted.depends_on]
    return (reasons or [OLDER_FILE]) + data


def _same(was, now) -> bool:
    """Equal, mappings in the same order too: the order of the terms is part of the model."""
    return was == now and (not isinstance(now, dict) or list(was) == list(now))


# Dependencies `compiler.fit_dependencies` writes only when the spec sets them.
WHEN_SET = ("power", "folds", "errors", "groups")

# Spec fields that map term names to a setting, and how a reason names the setting.
PER_TERM = {"expect": "expected sign", "step": "step", "notes": "note"}


def _changes(key: str, was, now) -> list[str]:
    """One dependency's change in words: per term, per part (holdout, penalty) or as a whole."""
    if key == "terms":
        return _term_changes(was, now)
    if key in PER_TERM:
        return [f"{PER_TERM[key]} of term '{name}' changed" for name in sorted({*was, *now}) if was.get(name) != now.get(name)]
    if isinstance(now, dict) and isinstance(was, dict):
        return [f"{key} {part} changed from {_shown(was.get(part))} to {_shown(value)}"
                for part, value in now.items() if was.get(part) != value]
    return [f"{key} changed from {_shown(was)} to {_shown(now)}"]


def _term_changes(was: dict[str, str], now: dict[str, str]) -> list[str]:
    """Terms added or redefined (by fingerprint, in model order), then removed; else a change in their order."""
    reasons = [f"term '{name}' changed meaning" if name in was else f"term '{name}' was added"
               for name in now if was.get(name) != now[name]]
    reasons += [f"term '{name}' was removed" for name in was if name not in now]
    return reasons or ["the order of terms changed"]


def _shown(value) -> str:
    return "none" if value is None else f"{value:.15g}" if isinstance(value, float) else str(value)


def stale_fits(compiled) -> tuple[str, ...]:
    """One line per fitted file whose model changed since it was fitted."""
    lines = []
    for name, model in sorted(compiled.models.items()):
        path = compiled.project.fitted_path(name)
        if path.is_file():
            reasons = staleness(read_fitted(path), model, compiled.project.inputs)
            if reasons:
                lines.append(f"fitted/{name}.yaml is stale: {'; '.join(reasons)}")
    return tuple(lines)
