"""The scoring query of a fitted model: one self-contained SELECT built from plain data alone.

`ScoringModel` holds exactly what the query needs: the key, the input's name, the family, the
intercept, the offset's SQL, the declared column types and per term its canonical SQL, coefficient
and training mean. featpipe.fitted.scoring.scoring_model takes it from a fitted file (checking the
file first), so every term is computed from the canonical SQL stored in the fitted file, never from
the current term files, and a later edit of a term cannot change what a fitted model scores.

The query reads in steps (common table expressions), each computing something once:

    term_values    the key, every term value as DOUBLE (hardened SQL) and the offset
    checked_terms  plus `status`: 'ok', or 'missing: <term>' naming the FIRST NULL term in model order
    contributions  the linear predictor and one contribution per term
    reason_k_top   (with reasons, per reason k) the largest contribution not yet chosen
    reason_k_pick  `reason_k`: the name of the first term in model order holding it (when positive);
                   the next round sets that term aside
    final SELECT   the prediction through the inverse link; contributions and reasons of complete rows

The prediction uses the fit's own inverse link (`metrics.prediction`): the linear predictor is clamped
to [-700, 700] before EXP, so EXP never overflows, nor underflows to an error on PostgreSQL.

Output columns (named in featpipe.project.names), in order: the key, `prediction`, `linear_predictor`,
`offset` (models with an offset only), `contribution_<term>` per term in model order, `status`, and
with reasons K > 0, `reason_1` .. `reason_K`.

Contributions are centred at the training means: contribution_t = coefficient_t * (value_t - mean_t),
so for every complete row

    linear_predictor = baseline + offset + SUM(contribution_t)

where `baseline` = intercept + SUM(coefficient_t * mean_t) is the linear predictor of a row sitting at
the training means (written in the scoring SQL's header comment), and offset is 0 for models without one.

Rows that cannot be scored honestly get no number: when any term (or the offset) is NULL, the
prediction, linear predictor and contributions are NULL and `status` names the first missing one.

Unseen values: terms are expressions, so a category the training never saw simply takes the value its
expression gives (an indicator such as CASE WHEN sector = 'health' THEN 1 ELSE 0 END gives 0, i.e. the
reference level), and a value outside the training range is scored as the linear model extrapolates.
Neither is refused here; `featpipe drift` reports the shares of such values against the training
profile.

Example:
    >>> term = ScoringTerm("age", '"age"', is_boolean=False, estimate=0.25, mean=40.0)
    >>> model = ScoringModel("id", "people", "gaussian", -1.5, None, {"id": "BIGINT", "age": "DOUBLE"}, (term,),
    ...                      "fitted/m.yaml")
    >>> baseline(model)
    8.5
    >>> [column.alias_or_name for column in score_query(model, reasons=1).expressions]
    ['id', 'prediction', 'linear_predictor', 'contribution_age', 'status', 'reason_1']
"""

from __future__ import annotations

from dataclasses import dataclass

import sqlglot
from sqlglot import exp
from sqlglot.errors import ParseError, TokenError

from ..compiler.allowlist import check_allowed
from ..compiler.layout import DesignLayout
from ..errors import FeatpipeError
from ..project.names import (
    INTERCEPT,
    LINEAR_PREDICTOR,
    OFFSET,
    OFFSET_COLUMN,
    PREDICTION,
    STATUS,
    contribution_column,
    reason_column,
    table_reference,
)
from .common import alias, column, number
from .design import learned_value
from .harden import as_number, harden
from .learned import LearnedConstants, design_columns
from .metrics import linear_predictor, prediction

FITTED_DIALECT = "duckdb"  # the fitted file stores canonical SQL in the duckdb dialect

TERM_VALUES, CHECKED, CONTRIBUTIONS = "term_values", "checked_terms", "contributions"
OK = "ok"
SET_ASIDE = -1.0  # a chosen term's contribution in later rounds: below every positive one, so never chosen again


@dataclass(frozen=True)
class ScoringTerm:
    """One term as the scoring query computes it."""

    name: str
    sql: str  # canonical SQL over input columns, in FITTED_DIALECT
    is_boolean: bool  # booleans count as 1.0 / 0.0
    estimate: float
    mean: float  # the training mean, at which contributions are centred
    # A design column of a learned term: the term's name, its constants and the column's index; `sql`
    # is then the term's argument and `name` the column's (fitting/learned.py).
    term: str | None = None
    learned: LearnedConstants | None = None
    index: int = 0
    kind: str = "numeric"

    @property
    def group(self) -> str:
        """The term the column belongs to: its contribution and reason code are the term's."""
        return self.term or self.name


@dataclass(frozen=True)
class ScoringModel:
    """Everything the scoring query reads, as plain data."""

    key: str
    table: str  # the table scored by default: the input the model was fitted on
    family: str
    intercept: float
    offset: str | None  # SQL over input columns, in FITTED_DIALECT
    columns: dict[str, str]  # declared SQL type of every input column the terms and offset read
    terms: tuple[ScoringTerm, ...]  # in model order
    source: str  # where the model comes from, for messages, e.g. "fitted/NAME.yaml"

    @property
    def coefficients(self) -> dict[str, float]:
        return {INTERCEPT: self.intercept, **{term.name: term.estimate for term in self.terms}}

    @property
    def groups(self) -> list[str]:
        """The model's terms in order: a learned term's columns count as one term."""
        return list(dict.fromkeys(term.group for term in self.terms))


def missing_status(name: str) -> str:
    return f"missing: {name}"


def baseline(model: ScoringModel) -> float:
    """The linear predictor (without offset) of a row whose every term sits at its training mean."""
    return model.intercept + sum(term.estimate * term.mean for term in model.terms)


def score_query(model: ScoringModel, *, table: str | None = None, reasons: int = 0) -> exp.Select:
    """The scoring SELECT of `model` over `table` (default: `model.table`, the fitted input's name).

    `reasons` K > 0 adds reason_1..reason_K: the names of the K terms with the largest positive
    contributions (ties broken by model order), NULL where fewer than K terms push the prediction up.
    They are chosen in K rounds of GREATEST and comparisons (`reason_steps`), about 3 n operations a
    round for n terms rather than n^2 for a full ranking, and the SQL needs no array or window functions.
    """
    names = model.groups
    if not 0 <= reasons <= len(names):
        raise FeatpipeError(f"--reasons must be between 0 and {len(names)}, the number of terms in {model.source}")
    steps = [
        (TERM_VALUES, _term_values(model, table)),
        (CHECKED, _checked_terms(model, names)),
        (CONTRIBUTIONS, _contributions(model)),
    ]
    outputs = [column(model.key), alias(_prediction(model, column(LINEAR_PREDICTOR)), PREDICTION),
               column(LINEAR_PREDICTOR)]
    outputs += [column(OFFSET)] if model.offset is not None else []
    outputs += [_if_complete(contribution_column(name)) for name in names]
    outputs.append(column(STATUS))
    if reasons:
        steps += reason_steps(names, steps[-1][1], reasons)
        outputs += [_if_complete(reason_column(rank)) for rank in range(1, reasons + 1)]
    query = exp.select(*outputs).from_(exp.to_table(steps[-1][0]))
    for name, step in steps:
        query = query.with_(name, as_=step)
    return query


def _if_complete(name: str) -> exp.Expression:
    """Column `name` where the row's status is 'ok', else NULL. The reasons read the contributions as
    computed, so a row's status is tested once per reason rather than once per term: 2M rows, 20 terms,
    three reasons, the fastest of six interleaved runs 1.68 and 1.90 s against 1.97 and 2.14 s (two
    batches of runs; the same reasons)."""
    return alias(exp.Case().when(column(STATUS).eq(exp.Literal.string(OK)), column(name)), name)


def _term_values(model: ScoringModel, table: str | None) -> exp.Select:
    """The key, each term's value as DOUBLE and the offset, from `table` (given as --table) or the input table."""
    source = table_reference(table, "--table") if table else table_reference(model.table, f"{model.source}: input")
    values = [column(model.key), *(alias(term_value(model, term), term.name) for term in model.terms)]
    values += [alias(_learned_argument(model, term), learned_value_column(term.group))
               for term in model.terms if term.learned is not None and term.index == 0]
    if model.offset is not None:
        values.append(alias(_parsed(model, "offset", model.offset, is_boolean=False), OFFSET_COLUMN))
    return exp.select(*values).from_(source)


def _checked_terms(model: ScoringModel, names: list[str]) -> exp.Select:
    """Everything of term_values, plus the row's status."""
    has_offset = model.offset is not None
    columns = [term.name for term in model.terms]
    columns += [learned_value_column(term.group) for term in model.terms if term.learned is not None and term.index == 0]
    carried = [column(model.key), *map(column, columns), *([column(OFFSET_COLUMN)] if has_offset else [])]
    learned = any(term.learned is not None for term in model.terms)
    status = alias(_status(model, names) if learned else status_expression(names, has_offset), STATUS)
    return exp.select(*carried, status).from_(exp.to_table(TERM_VALUES))


def _contributions(model: ScoringModel) -> exp.Select:
    """The key, status, linear predictor, offset and each term's contribution (NULL where the term is;
    `score_query` leaves out those of a row that is not complete).

    checked_terms has the shape of a design table without its target (key, DOUBLE terms, offset), so
    the fit's own linear predictor, which reads only terms and offset, applies to it unchanged.
    """
    names = tuple(term.name for term in model.terms)
    has_offset = model.offset is not None
    shape = DesignLayout(CHECKED, model.key, target="", terms=names, offset=OFFSET_COLUMN if has_offset else None)
    projections = [column(model.key), column(STATUS),
                   alias(linear_predictor(shape, model.coefficients), LINEAR_PREDICTOR)]
    projections += [alias(column(OFFSET_COLUMN), OFFSET)] if has_offset else []
    for group in model.groups:
        parts = [exp.Mul(this=number(term.estimate),
                         expression=exp.Paren(this=exp.Sub(this=column(term.name), expression=number(term.mean))))
                 for term in model.terms if term.group == group]
        total = parts[0]
        for part in parts[1:]:
            total = exp.Add(this=total, expression=part)
        projections.append(alias(total, contribution_column(group)))
    return exp.select(*projections).from_(exp.to_table(CHECKED))


def reason_steps(names: list[str], contributions: exp.Select, reasons: int) -> list[tuple[str, exp.Select]]:
    """The steps choosing reasons 1..`reasons`, after `contributions`; each carries every column before it.

    Round k takes the largest of the contributions still in play (`_top_k`, GREATEST; on a row that is
    not complete some are NULL, and `score_query` drops its reasons whatever the engine's GREATEST
    makes of them), and names the first term in model order holding it when it is positive (`reason_k`, NULL otherwise). Round k + 1 reads the contributions with that term set
    aside (SET_ASIDE), so a tie goes to the earlier term first and the later one next. The pick is the
    reason column itself: a separate position mapped to a name afterwards cost another comparison
    chain per reason (benchmarks/bench_score.py).
    """
    carried = [projection.alias_or_name for projection in contributions.expressions]
    in_play = [contribution_column(name) for name in names]
    steps, previous = [], CONTRIBUTIONS

    def step(name: str, *added: exp.Expression) -> None:
        nonlocal previous
        steps.append((name, exp.select(*map(column, carried), *added).from_(exp.to_table(previous))))
        previous = name

    for rank in range(1, reasons + 1):
        if rank > 1:  # set the last pick aside; the previous round's own columns are no longer needed
            chosen = column(reason_column(rank - 1))
            left = [_left_column(rank, name) for name in names]
            if rank > 2:
                carried = [name for name in carried if name not in in_play]
            step(f"reason_{rank}_left", *(
                alias(exp.Case().when(chosen.eq(exp.Literal.string(term)), number(SET_ASIDE)).else_(column(value)), name)
                for term, value, name in zip(names, in_play, left, strict=True)))
            carried += left
            in_play = left
        top = exp.Greatest(this=column(in_play[0]), expressions=[column(name) for name in in_play[1:]], ignore_nulls=True)
        step(f"reason_{rank}_top", alias(top, _top_column(rank)))
        pick = exp.Case()
        for term, name in zip(names, in_play, strict=True):
            pick = pick.when(column(name).eq(column(_top_column(rank))), exp.Literal.string(term))
        step(f"reason_{rank}_pick", alias(exp.Case().when(exp.GT(this=column(_top_column(rank)), expression=number(0.0)), pick),
                                          reason_column(rank)))
        carried.append(reason_column(rank))
    return steps


def term_value(model: ScoringModel, term: ScoringTerm) -> exp.Expression:
    """A term's value as DOUBLE from its fitted canonical SQL, hardened like the design table's; a learned
    term's column from its argument and constants, as the fit computed it."""
    if term.learned is not None:
        return design_columns(term.learned, _learned_argument(model, term))[term.index]
    return _parsed(model, f"term '{term.name}'", term.sql, is_boolean=term.is_boolean)


def learned_value_column(term: str) -> str:
    """The scoring query's column of a learned term's argument (no term name holds '__')."""
    return f"_{term}__value"


def _learned_argument(model: ScoringModel, term: ScoringTerm) -> exp.Expression:
    return learned_value(term.kind, _hardened(model, f"term '{term.group}'", term.sql))


def _status(model: ScoringModel, names: list[str]) -> exp.Expression:
    """As `status_expression`, where a learned term is 'missing' when its argument is NULL and 'unseen'
    when it holds a level the training never saw (its columns are NULL then)."""
    case = exp.Case()
    for name in names:
        columns = [term for term in model.terms if term.group == name]
        if columns[0].learned is None:
            case = case.when(column(name).is_(exp.null()), exp.Literal.string(missing_status(name)))
            continue
        case = case.when(column(learned_value_column(name)).is_(exp.null()), exp.Literal.string(missing_status(name)))
        case = case.when(column(columns[0].name).is_(exp.null()), exp.Literal.string(f"unseen: {name}"))
    if model.offset is not None:
        case = case.when(column(OFFSET_COLUMN).is_(exp.null()), exp.Literal.string(missing_status(OFFSET)))
    return case.else_(exp.Literal.string(OK))


def status_expression(names: list[str], has_offset: bool) -> exp.Expression:
    """'ok', or 'missing: <name>' for the first NULL term in model order (then the offset)."""
    case = exp.Case()
    for name, internal in [*((name, name) for name in names), *([(OFFSET, OFFSET_COLUMN)] if has_offset else [])]:
        case = case.when(column(internal).is_(exp.null()), exp.Literal.string(missing_status(name)))
    return case.else_(exp.Literal.string(OK))


def score_statement(
    model: ScoringModel, *, table: str | None = None, reasons: int = 0, as_view: str | None = None, into: str | None = None
) -> exp.Expression:
    """The scoring query, optionally wrapped as CREATE VIEW `as_view` or CREATE TABLE `into` AS."""
    query = score_query(model, table=table, reasons=reasons)
    if as_view and into:
        raise FeatpipeError("give --as-view or --into, not both")
    if as_view:
        return exp.Create(this=table_reference(as_view, "--as-view"), kind="VIEW", expression=query)
    if into:
        return exp.Create(this=table_reference(into, "--into"), kind="TABLE", expression=query)
    return query


def _parsed(model: ScoringModel, what: str, sql: str | None, *, is_boolean: bool) -> exp.Expression:
    """Parse fitted SQL and re-check it against the allow-list (the file may have been edited by hand), as DOUBLE."""
    return as_number(_hardened(model, what, sql), is_boolean)


def _hardened(model: ScoringModel, what: str, sql: str | None) -> exp.Expression:
    """Parse fitted SQL, re-check it against the allow-list and harden it."""
    if not sql:
        raise FeatpipeError(f"{model.source}: {what} has no SQL; run `featpipe fit` again")
    try:
        tree = sqlglot.parse_one(sql, dialect=FITTED_DIALECT)
    except (ParseError, TokenError) as error:
        raise FeatpipeError(f"{model.source}: {what} is not a SQL expression ({str(error).splitlines()[0]}); "
                            "run `featpipe fit` again") from None
    problems = check_allowed(tree, model.source)
    if problems:
        raise FeatpipeError(f"{model.source}: {what}: {problems[0].message}; run `featpipe fit` again")
    return harden(tree, schema=model.columns)


def _prediction(model: ScoringModel, eta: exp.Expression) -> exp.Expression:
    try:
        return prediction(model.family, eta)
    except ValueError as error:
        raise FeatpipeError(f"{model.source}: {error}") from None


def _left_column(rank: int, term: str) -> str:
    """Term's contribution as round `rank` reads it (SET_ASIDE once chosen)."""
    return f"_left_{rank}_{term}"


def _top_column(rank: int) -> str:
    return f"_top_{rank}"
