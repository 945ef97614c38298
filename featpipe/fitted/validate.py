"""Check a fitted file before any of it is used: it is untrusted input.

A fitted file is reviewed and committed like code, and the scoring SQL exported from it runs where
nobody runs featpipe, so it is read as strictly as a term file, in two steps:

- `check_values`: every key against its kind, as the schema below declares (`FITTED`): names follow
  the name rule, family and link come from their lists, fingerprints are hex of the right length,
  numbers are finite, column types parse as SQL types, `format` is one this featpipe reads.
- `check_integrity`: what the fingerprints cover is recomputed, so a hand edit is noticed: each term's
  stored SQL against its fingerprint (after parsing and re-canonicalising), the allow-list and the
  leakage check rerun on it and on the offset, the terms against `depends_on`, and `depends_on`
  against the model fingerprint (hashed by the compiler's own function).

Not covered by any fingerprint: coefficients, standard errors, profiles, metrics and notes. A hand edit
of them is not noticed (they are only checked to be finite numbers or text); they are meant to change
only through `featpipe fit`, and the reviewed diff of the file is what guards them.

Each refusal is one line naming the file and the key path, e.g.
`fitted/m.yaml: terms[3].estimate must be a finite number, not 'nan'; run featpipe fit again`.
"""

from __future__ import annotations

import datetime
import math
import re
from collections.abc import Callable
from dataclasses import fields

import sqlglot
from sqlglot import exp
from sqlglot.errors import ParseError, TokenError

from ..compiler import dependencies_fingerprint
from ..compiler.allowlist import check_allowed
from ..compiler.canonical import canonical_sql, fingerprint_of_sql
from ..compiler.learned import LEARNED_FUNCTIONS, argument_type, call_sql, learned_call
from ..compiler.types import term_type
from ..errors import FeatpipeError
from ..project.load import CROSS_VALIDATED, EXPECTATIONS, LINKS, is_sql_type
from ..project.names import INTERCEPT, NAME_PATTERN, NAME_RULE
from ..sqlgen.score import FITTED_DIALECT

AGAIN = "run featpipe fit again"


class Refusal(Exception):
    """One value of the file that is not of its kind: `problem` names its key path."""

    def __init__(self, problem: str, shape: bool = False):
        super().__init__(problem)
        self.problem = problem
        self.shape = shape  # the file's structure itself is wrong (a key missing, unknown, not a mapping)


Kind = Callable[[object, str], None]  # checks a value found at a key path, raising Refusal


def _shown(value) -> str:
    """A value as the one-line message shows it (line breaks escaped, long text cut)."""
    if isinstance(value, (list, tuple)):
        return "a list"
    if isinstance(value, dict):
        return "a mapping"
    if value is None:
        return "nothing"
    text = str(value).lower() if isinstance(value, bool) else str(value)
    return repr(text if len(text) <= 60 else text[:57] + "...")


def _child(path: str, key) -> str:
    """The key path of `key` under `path`: `terms[2].name`, `rows.dropped['null term x']`."""
    if isinstance(key, int):
        return f"{path}[{key}]"
    if isinstance(key, str) and NAME_PATTERN.match(key):
        return f"{path}.{key}" if path else key
    return f"{path}[{_shown(key)}]"


def scalar(rule: str, accepts: Callable[[object], bool]) -> Kind:
    def check(value, path: str) -> None:
        if not accepts(value):
            raise Refusal(f"{path} {rule}, not {_shown(value)}")
    return check


def _is_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _is_finite(value) -> bool:
    """A number that is a finite double (a whole number too large for one is not)."""
    try:
        return _is_number(value) and math.isfinite(value)
    except OverflowError:
        return False


def _is_iso_date(value) -> bool:
    try:
        return isinstance(value, str) and datetime.date.fromisoformat(value).isoformat() == value
    except ValueError:
        return False


FINGERPRINT_LENGTH = len(fingerprint_of_sql(""))

NAME = scalar(NAME_RULE, lambda value: isinstance(value, str) and NAME_PATTERN.match(value) is not None)
TERM_NAME = scalar(NAME_RULE, lambda value: value == INTERCEPT or isinstance(value, str) and NAME_PATTERN.match(value) is not None)
NUMBER = scalar("must be a finite number", _is_finite)
RATIO = scalar("must be a number", lambda value: _is_finite(value) or value in (math.inf, -math.inf))  # exp() may overflow
COUNT = scalar("must be a whole number of at least 0", lambda value: isinstance(value, int) and not isinstance(value, bool) and value >= 0)
TEXT = scalar("must be text", lambda value: isinstance(value, str))
FLAG = scalar("must be true or false", lambda value: isinstance(value, bool))
FINGERPRINT = scalar(f"must be {FINGERPRINT_LENGTH} lowercase hexadecimal digits",
                      lambda value: isinstance(value, str) and re.fullmatch(f"[0-9a-f]{{{FINGERPRINT_LENGTH}}}", value) is not None)
SQL_TYPE = scalar("must be a SQL type such as DOUBLE or VARCHAR", lambda value: isinstance(value, str) and is_sql_type(value))


def one_of(*allowed) -> Kind:
    rule = f"must be {allowed[0]}" if len(allowed) == 1 else f"must be one of {', '.join(map(str, allowed))}"
    return scalar(rule, lambda value: any(value == item and type(value) is type(item) for item in allowed))


def optional(kind: Kind) -> Kind:
    def check(value, path: str) -> None:
        if value is not None:
            kind(value, path)
    return check


def either(first: Kind, second: Kind) -> Kind:
    """A value of the first kind or, failing that, of the second (its refusal is the one reported)."""
    def check(value, path: str) -> None:
        try:
            first(value, path)
        except Refusal:
            second(value, path)
    return check


def listing(kind: Kind) -> Kind:
    def check(value, path: str) -> None:
        if not isinstance(value, list):
            raise Refusal(f"{path} must be a list, not {_shown(value)}")
        for index, item in enumerate(value):
            kind(item, _child(path, index))
    return check


def mapping(key_kind: Kind, value_kind: Kind) -> Kind:
    def check(value, path: str) -> None:
        if not isinstance(value, dict):
            raise Refusal(f"{path} must be a mapping, not {_shown(value)}")
        for key, item in value.items():
            key_kind(key, f"a key of {path}")
            value_kind(item, _child(path, key))
    return check


def record(required: dict[str, Kind], optional_keys: dict[str, Kind] | None = None) -> Kind:
    """A mapping with exactly these keys (the optional ones may be left out), each of its kind."""
    kinds = {**required, **(optional_keys or {})}

    def check(value, path: str) -> None:
        where = path or "the file"
        if not isinstance(value, dict):
            raise Refusal(f"{where} is not a mapping of keys", shape=True)
        missing = [key for key in required if key not in value]
        if missing:
            raise Refusal(f"{_child(path, missing[0])} is missing", shape=True)
        unknown = [key for key in value if key not in kinds]
        if unknown:
            raise Refusal(f"{_child(path, unknown[0])} is not a key of a fitted file", shape=True)
        for key, item in value.items():
            kinds[key](item, _child(path, key))
    return check


OPTIONAL_NUMBER = optional(NUMBER)
WEIGHTS = optional(either(NAME, record({"column": NAME, "kind": one_of("frequency")})))
FAMILY = one_of(*LINKS)
TWEEDIE_POWER = scalar("must be a number strictly between 1 and 2", lambda value: _is_finite(value) and 1 < value < 2)
HOLDOUT = record({"salt": TEXT}, {"fraction": NUMBER, "column": NAME,
                                   "from": scalar("must be a date like 2025-07-01 or a finite number",
                                                   lambda value: _is_iso_date(value) or _is_finite(value))})
PENALTY = record({"l2": scalar("must be a finite number or cv", lambda value: _is_finite(value) or value == CROSS_VALIDATED),
                  "l1": NUMBER})
PROFILE = record({
    "count": COUNT, "nulls": COUNT, "mean": OPTIONAL_NUMBER, "sd": OPTIONAL_NUMBER, "min": OPTIONAL_NUMBER,
    "max": OPTIONAL_NUMBER, "median": OPTIONAL_NUMBER, "edges": listing(NUMBER), "shares": listing(NUMBER),
})
EFFECT = record({"kind": TEXT, "step": NUMBER, "value": RATIO, "low": optional(RATIO), "high": optional(RATIO)},
                {"basis": one_of("step", "sd", "indicator")})
WALD = record({"statistic": NUMBER, "df": COUNT, "p_value": NUMBER})
LEARNED_COLUMN = record({"label": TEXT, "estimate": NUMBER, "std_error": OPTIONAL_NUMBER, "statistic": OPTIONAL_NUMBER,
                         "p_value": OPTIONAL_NUMBER, "ci_low": OPTIONAL_NUMBER, "ci_high": OPTIONAL_NUMBER,
                         "mean": NUMBER, "reading": TEXT})
LEARNED = record(
    {"function": one_of(*LEARNED_FUNCTIONS), "arguments": listing(NUMBER), "columns": listing(LEARNED_COLUMN),
     "wald": optional(WALD)},
    {"levels": listing(record({"level": TEXT, "rows": COUNT})), "reference": TEXT, "pooled": listing(TEXT),
     "values": listing(NUMBER), "data": TEXT},
)
TERM = record(
    {"name": TERM_NAME, "estimate": OPTIONAL_NUMBER, "std_error": OPTIONAL_NUMBER, "statistic": OPTIONAL_NUMBER,
     "p_value": OPTIONAL_NUMBER, "ci_low": OPTIONAL_NUMBER, "ci_high": OPTIONAL_NUMBER},
    {"fingerprint": optional(FINGERPRINT), "sql": optional(TEXT), "kind": one_of("intercept", "numeric", "boolean", "text", "whole"),
     "doc": TEXT, "columns": listing(NAME), "built_from": listing(NAME), "effect": optional(EFFECT),
     "vif": OPTIONAL_NUMBER, "profile": optional(PROFILE), "notes": listing(TEXT), "learned": optional(LEARNED)},
)
ROWS = record({}, {"input": COUNT, "complete": COUNT, "train": COUNT, "holdout": COUNT, "dropped": mapping(TEXT, COUNT),
                  "imputed": mapping(NAME, COUNT), "unseen": mapping(NAME, COUNT)})
FIT = record({}, {
    "converged": FLAG, "iterations": COUNT, "deviance": NUMBER, "null_deviance": NUMBER, "log_likelihood": OPTIONAL_NUMBER,
    "aic": OPTIONAL_NUMBER, "bic": OPTIONAL_NUMBER, "dispersion": NUMBER, "power": TWEEDIE_POWER, "statistic": TEXT, "penalized": FLAG, "passes": COUNT,
    "effective_df": NUMBER, "observations": NUMBER, "conventions": mapping(NAME, TEXT), "pearson_chi2": NUMBER, "pearson_dispersion": NUMBER,
    "errors": record({"kind": one_of("HC1", "cluster"), "clusters": COUNT, "correction": NUMBER}, {"column": NAME}),
})
CALIBRATION = record({}, {"decile": COUNT, "rows": COUNT, "mean_predicted": NUMBER, "mean_observed": NUMBER})
GAINS = record({"decile": COUNT, "rows": COUNT, "events": COUNT, "event_rate": NUMBER,
                "cumulative_event_share": OPTIONAL_NUMBER, "lift": OPTIONAL_NUMBER})
METRICS = record({}, {
    "rows": COUNT, "events": COUNT, "accuracy": OPTIONAL_NUMBER, "baseline_accuracy": OPTIONAL_NUMBER,
    "precision": OPTIONAL_NUMBER, "recall": OPTIONAL_NUMBER, "auc": OPTIONAL_NUMBER, "log_loss": OPTIONAL_NUMBER,
    "brier": OPTIONAL_NUMBER, "deviance": OPTIONAL_NUMBER, "mean_absolute_error": OPTIONAL_NUMBER,
    "rmse": OPTIONAL_NUMBER, "mean_observed": OPTIONAL_NUMBER, "mean_predicted": OPTIONAL_NUMBER,
    "calibration": listing(CALIBRATION),
    "auc_low": OPTIONAL_NUMBER, "auc_high": OPTIONAL_NUMBER, "gini": OPTIONAL_NUMBER, "ks": OPTIONAL_NUMBER,
    "ks_score": OPTIONAL_NUMBER, "calibration_intercept": OPTIONAL_NUMBER, "calibration_slope": OPTIONAL_NUMBER,
    "gains": listing(GAINS),
})
CROSSVAL = record(
    {"folds": COUNT, "salt": TEXT, "passes": COUNT,
     "per_fold": listing(record({"fold": COUNT, "train": COUNT, "converged": FLAG, "metrics": METRICS})),
     "mean": mapping(NAME, NUMBER), "sd": mapping(NAME, NUMBER)},
    {"l2": record({"grid": listing(NUMBER), "deviance": listing(NUMBER), "chosen": NUMBER})},
)
# featpipe.fitting.groups: per group column, its groups (a group under 30 rows gives its rows only).
GROUP = record({"group": optional(TEXT), "rows": COUNT, "too_small": FLAG}, {
    "mean_observed": NUMBER, "mean_predicted": NUMBER, "observed_to_predicted": OPTIONAL_NUMBER, "events": COUNT,
    "flagged_share": NUMBER, "auc": OPTIONAL_NUMBER, "flagged_ratio": OPTIONAL_NUMBER, "unflagged_ratio": OPTIONAL_NUMBER,
})
GROUPS = mapping(NAME, listing(GROUP))
# featpipe.fitting.inputs: per input column a term reads, its NULLs on the training rows and (text) the levels seen.
INPUT_PROFILES = record({"rows": COUNT, "columns": mapping(NAME, record({"nulls": COUNT}, {"levels": optional(listing(TEXT))}))})
# compiler.fit_dependencies as written; files fitted before a dependency was recorded lack it.
DEPENDS_ON = record({"terms": mapping(NAME, FINGERPRINT)}, {
    "input": NAME, "key": NAME, "target": NAME, "family": FAMILY, "power": TWEEDIE_POWER, "offset": optional(TEXT), "weights": WEIGHTS,
    "holdout": HOLDOUT, "penalty": PENALTY, "folds": COUNT, "threshold": NUMBER, "max_dropped": NUMBER,
    "errors": either(one_of("robust"), record({"cluster": NAME})),
    "trials": NAME,
    "expect": mapping(NAME, one_of(*EXPECTATIONS)), "step": mapping(NAME, NUMBER), "notes": mapping(NAME, TEXT),
    "groups": listing(NAME),
})
FORMAT_VERSION = 1  # the format of fitted files this featpipe writes and reads
FORMAT = one_of(FORMAT_VERSION)
FITTED = record(
    {"model": NAME, "fingerprint": FINGERPRINT, "input": NAME, "key": NAME, "target": NAME, "family": FAMILY,
     "link": one_of(*dict.fromkeys(LINKS.values())), "offset": optional(TEXT), "weights": WEIGHTS, "holdout": HOLDOUT,
     "threshold": NUMBER, "penalty": PENALTY, "columns": mapping(NAME, SQL_TYPE), "rows": ROWS, "fit": FIT,
     "terms": listing(TERM), "depends_on": DEPENDS_ON},
    {"linear_predictor": optional(PROFILE), "metrics": METRICS, "crossval": CROSSVAL, "input_profiles": INPUT_PROFILES,
     "group_tables": GROUPS, "warnings": listing(TEXT),
     "format": FORMAT},
)


def check_values(data, source: str) -> None:
    """Refuse the first key of `data` (a fitted file as loaded) whose value is not of its kind.

    The format comes first: a file of another format is refused as such, not for its keys.
    """
    try:
        if isinstance(data, dict) and "format" in data:
            FORMAT(data["format"], "format")
        FITTED(data, "")
    except Refusal as refusal:
        if refusal.shape:
            raise FeatpipeError(f"{source}: not a fitted file featpipe can read ({refusal.problem}); {AGAIN}") from None
        raise FeatpipeError(f"{source}: {refusal.problem}; {AGAIN}") from None


def check_record(data, kind: Kind, source: str, again: str) -> None:
    """Refuse the first key of `data` (a record featpipe wrote, as loaded) that is not of its `kind`;
    `again` says what to do."""
    try:
        kind(data, "")
    except Refusal as refusal:
        raise FeatpipeError(f"{source}: {refusal.problem}; {again}") from None


def check_integrity(fitted, source: str) -> None:
    """Refuse a fitted file whose stored SQL, fingerprints and terms no longer agree: it was edited by hand.

    `fitted` is the FittedModel of values that passed `check_values`.
    """
    try:
        _check_agreement(fitted)
    except Refusal as refusal:
        raise FeatpipeError(f"{source} was edited by hand: {refusal.problem}; run featpipe fit") from None


def _check_agreement(fitted) -> None:
    if fitted.link != LINKS[fitted.family]:
        raise Refusal(f"link {fitted.link} is not the link of family {fitted.family} ({LINKS[fitted.family]})")
    if (fitted.family == "tweedie") != ("power" in fitted.fit) or fitted.fit.get("power") != fitted.depends_on.get("power"):
        raise Refusal("fit.power must be given for a tweedie fit only, equal to depends_on.power")
    if _errors_asked(fitted.depends_on.get("errors")) != _errors_made(fitted.fit.get("errors")):
        raise Refusal("fit.errors must record the standard errors depends_on.errors asks for")
    recorded = fitted.depends_on
    for name in (field.name for field in fields(fitted)):
        if name in recorded and name != "terms" and getattr(fitted, name) != recorded[name]:
            raise Refusal(f"{name} does not match depends_on.{name}")
    if fitted.key not in fitted.columns:
        raise Refusal(f"key {fitted.key} is not among the columns")
    intercept = fitted.terms[0] if fitted.terms else None
    if intercept is None or (intercept.name, intercept.kind, intercept.sql, intercept.fingerprint) != (INTERCEPT, "intercept", None, None):
        raise Refusal(f"the first term must be the intercept '{INTERCEPT}', without SQL or fingerprint")
    fitted_terms: dict[str, str] = {}
    for term in fitted.model_terms:
        if term.name == INTERCEPT or term.name in fitted_terms or term.sql is None or term.fingerprint is None:
            raise Refusal(f"term {term.name} must be listed once, with its SQL and fingerprint")
        if term.learned is not None:
            _check_learned(fitted, term)
        else:
            tree = _checked_sql(fitted, f"term {term.name}'s SQL", term.sql, term.fingerprint)
            if term_type(tree, fitted.columns)[0] != term.kind or term.estimate is None:
                raise Refusal(f"term {term.name}'s kind does not match its SQL")
        fitted_terms[term.name] = term.fingerprint
    if fitted.offset is not None:
        _checked_sql(fitted, "the offset", fitted.offset, None)
    _check_terms_recorded(fitted_terms, recorded["terms"])
    if dependencies_fingerprint(recorded) != fitted.fingerprint:
        raise Refusal("the model fingerprint does not match depends_on")


def _check_learned(fitted, term) -> None:
    """A learned term's argument SQL, call and kind against its fingerprint; one estimate only for one column."""
    tree = _checked_sql(fitted, f"term {term.name}'s SQL", term.sql, None)
    literals = [exp.Literal.number(value) for value in term.learned["arguments"]]
    call, problems = learned_call(exp.Anonymous(this=term.learned["function"], expressions=[tree.copy(), *literals]))
    if problems:
        raise Refusal(f"term {term.name}: {problems[0][1]}")
    if fingerprint_of_sql(call_sql(call, tree)) != term.fingerprint:
        raise Refusal(f"term {term.name}'s SQL does not match its fingerprint")
    if argument_type(call, tree, fitted.columns)[0] != term.kind:
        raise Refusal(f"term {term.name}'s kind does not match its SQL")
    if (term.estimate is None) != (len(term.learned["columns"]) > 1) or not term.learned["columns"]:
        raise Refusal(f"term {term.name} must have one estimate exactly when it has one column")


def _errors_asked(errors) -> tuple[str, str | None] | None:
    """depends_on.errors as (kind, cluster column); None for the model's own standard errors."""
    if errors is None:
        return None
    return ("HC1", None) if errors == "robust" else ("cluster", errors["cluster"])


def _errors_made(record: dict | None) -> tuple[str, str | None] | None:
    return None if record is None else (record["kind"], record.get("column"))


def _checked_sql(fitted, what: str, sql: str, fingerprint: str | None) -> exp.Expression:
    """The tree of stored SQL, refused unless it is one allowed expression over the declared columns,
    without the target, in canonical form and (for a term) matching its fingerprint."""
    try:
        statements = sqlglot.parse(sql, dialect=FITTED_DIALECT)
    except (ParseError, TokenError):
        statements = []
    if len(statements) != 1 or statements[0] is None:
        raise Refusal(f"{what} is not one SQL expression")
    tree = statements[0]
    problems = check_allowed(tree, what)
    if problems:
        raise Refusal(f"{what}: {problems[0].message}")
    read = {column.name for column in tree.find_all(exp.Column)}
    if fitted.target in read:
        raise Refusal(f"{what} reads the target {fitted.target}")
    canonical = canonical_sql(tree)
    if fingerprint is not None and fingerprint_of_sql(canonical) != fingerprint:
        raise Refusal(f"{what} does not match its fingerprint")
    if canonical != sql:
        raise Refusal(f"{what} is not the canonical SQL featpipe writes")
    undeclared = sorted(read - set(fitted.columns))
    if undeclared:
        raise Refusal(f"{what} reads {_shown(undeclared[0])}, which is not among the columns")
    return tree


def _check_terms_recorded(fitted_terms: dict[str, str], recorded: dict[str, str]) -> None:
    """The fitted terms are exactly the terms of depends_on, with the same fingerprints, in the same order."""
    for name in recorded:
        if name not in fitted_terms:
            raise Refusal(f"depends_on lists term {name}, which the file does not fit")
    for name, fingerprint in fitted_terms.items():
        if name not in recorded:
            raise Refusal(f"term {name} is not in depends_on")
        if recorded[name] != fingerprint:
            raise Refusal(f"term {name}'s fingerprint is not the one in depends_on")
    if list(recorded) != list(fitted_terms):
        raise Refusal("the terms are not in the order of depends_on")
