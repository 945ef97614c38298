"""The scoring query of a fitted model: one self-contained SELECT built from the fitted file alone.

Every term is computed from the canonical SQL stored in the fitted file, never from the current term
files, so a later edit of a term cannot change what a fitted model scores. The query reads in steps
(common table expressions), each computing something once:

    term_values    the key, every term value as DOUBLE (hardened SQL) and the offset
    checked_terms  plus `status`: 'ok', or 'missing: <term>' naming the FIRST NULL term in model order
    contributions  the linear predictor and, for complete rows, one contribution per term
    reason_ranks   (with reasons) each term's rank among the contributions
    final SELECT   the prediction through the inverse link, and the reason codes

The prediction uses the fit's own inverse link (`metrics.prediction`): the linear predictor is clamped
to [-700, 700] before EXP, so EXP never overflows, nor underflows to an error on PostgreSQL.

Output columns, in order: the key, `prediction`, `linear_predictor`, `offset` (models with an offset
only), `contribution_<term>` per term in model order, `status`, and with reasons K > 0,
`reason_1` .. `reason_K`.

Contributions are centred at the training means: contribution_t = coefficient_t * (value_t - mean_t),
so for every complete row

    linear_predictor = baseline + offset + SUM(contribution_t)

where `baseline` = intercept + SUM(coefficient_t * mean_t) is the linear predictor of a row sitting at
the training means (written in the header comment), and offset is 0 for models without one.

Rows that cannot be scored honestly get no number: when any term (or the offset) is NULL, the
prediction, linear predictor and contributions are NULL and `status` names the first missing one.

Unseen values: terms are expressions, so a category the training never saw simply takes the value its
expression gives (an indicator such as CASE WHEN sector = 'health' THEN 1 ELSE 0 END gives 0, i.e. the
reference level), and a value outside the training range is scored as the linear model extrapolates.
Neither is refused here; `featpipe drift` reports the shares of such values against the training
profile.

Example:
    >>> from featpipe.fitted import read_fitted                        # doctest: +SKIP
    >>> query = score_query(read_fitted(path), reasons=3)              # doctest: +SKIP
    >>> print(render_score(query, fitted, fitted_hash, "postgres"))    # doctest: +SKIP
"""

from __future__ import annotations

import sqlglot
from sqlglot import exp
from sqlglot.errors import ParseError, TokenError

from ..compiler.allowlist import check_allowed
from ..compiler.layout import DesignLayout
from ..errors import FeatpipeError
from ..fitted import INTERCEPT, FittedModel, FittedTerm
from ..project.names import OFFSET_COLUMN
from .common import alias, column, number, render
from .harden import as_number, harden
from .metrics import linear_predictor, prediction

FITTED_DIALECT = "duckdb"  # the fitted file stores canonical SQL in the duckdb dialect

TERM_VALUES, CHECKED, CONTRIBUTIONS, RANKS = "term_values", "checked_terms", "contributions", "reason_ranks"
PREDICTION, LINEAR_PREDICTOR, OFFSET, STATUS = "prediction", "linear_predictor", "offset", "status"
OK = "ok"


def contribution_column(term: str) -> str:
    return f"contribution_{term}"


def reason_column(rank: int) -> str:
    return f"reason_{rank}"


def missing_status(name: str) -> str:
    return f"missing: {name}"


def model_terms(fitted: FittedModel) -> tuple[FittedTerm, ...]:
    """The terms after the intercept, in model order."""
    if not fitted.terms or fitted.terms[0].name != INTERCEPT:
        raise FeatpipeError(f"{_source(fitted)}: the first term must be '{INTERCEPT}'; run `featpipe fit` again")
    return fitted.terms[1:]


def baseline(fitted: FittedModel) -> float:
    """The linear predictor (without offset) of a row whose every term sits at its training mean."""
    terms = model_terms(fitted)
    return fitted.terms[0].estimate + sum(term.estimate * _mean(fitted, term) for term in terms)


def score_query(fitted: FittedModel, *, table: str | None = None, reasons: int = 0) -> exp.Select:
    """The scoring SELECT of `fitted` over `table` (default: the fitted input's name).

    `reasons` K > 0 adds reason_1..reason_K: the names of the K terms with the largest positive
    contributions (ties broken by model order), NULL where fewer than K terms push the prediction up.
    Ranks are sums of CASE comparisons, so the SQL needs no array or window functions.
    """
    terms = model_terms(fitted)
    if not 0 <= reasons <= len(terms):
        raise FeatpipeError(f"--reasons must be between 0 and {len(terms)}, the number of terms of model '{fitted.model}'")
    _refuse_clashes(fitted, terms)
    names = [term.name for term in terms]
    steps = [
        (TERM_VALUES, _term_values(fitted, terms, table or fitted.input)),
        (CHECKED, _checked_terms(fitted, names)),
        (CONTRIBUTIONS, _contributions(fitted, terms)),
    ]
    outputs = [column(fitted.key), alias(_prediction(fitted.family, column(LINEAR_PREDICTOR)), PREDICTION),
               column(LINEAR_PREDICTOR)]
    outputs += [column(OFFSET)] if fitted.offset is not None else []
    outputs += [column(contribution_column(name)) for name in names]
    outputs.append(column(STATUS))
    if reasons:
        steps.append((RANKS, _reason_ranks(names, steps[-1][1])))
        outputs += [alias(reason_expression(names, rank), reason_column(rank)) for rank in range(1, reasons + 1)]
    query = exp.select(*outputs).from_(exp.to_table(steps[-1][0]))
    for name, step in steps:
        query = query.with_(name, as_=step)
    return query


def _term_values(fitted: FittedModel, terms: tuple[FittedTerm, ...], table: str) -> exp.Select:
    """The key, each term's value as DOUBLE and the offset, from the input table."""
    values = [column(fitted.key), *(alias(term_value(fitted, term), term.name) for term in terms)]
    if fitted.offset is not None:
        values.append(alias(_parsed(fitted, "offset", fitted.offset, is_boolean=False), OFFSET_COLUMN))
    return exp.select(*values).from_(exp.to_table(table))


def _checked_terms(fitted: FittedModel, names: list[str]) -> exp.Select:
    """Everything of term_values, plus the row's status."""
    has_offset = fitted.offset is not None
    carried = [column(fitted.key), *map(column, names), *([column(OFFSET_COLUMN)] if has_offset else [])]
    status = alias(status_expression(names, has_offset), STATUS)
    return exp.select(*carried, status).from_(exp.to_table(TERM_VALUES))


def _contributions(fitted: FittedModel, terms: tuple[FittedTerm, ...]) -> exp.Select:
    """The key, status, linear predictor, offset and, on complete rows, each term's contribution.

    checked_terms has the shape of a design table (key, DOUBLE terms, offset), so the fit's own linear
    predictor applies to it unchanged.
    """
    names = tuple(term.name for term in terms)
    has_offset = fitted.offset is not None
    shape = DesignLayout(CHECKED, fitted.key, fitted.target, names, offset=OFFSET_COLUMN if has_offset else None)
    complete = column(STATUS).eq(exp.Literal.string(OK))
    projections = [column(fitted.key), column(STATUS),
                   alias(linear_predictor(shape, fitted.coefficients), LINEAR_PREDICTOR)]
    projections += [alias(column(OFFSET_COLUMN), OFFSET)] if has_offset else []
    for term in terms:
        centred = exp.Paren(this=exp.Sub(this=column(term.name), expression=number(_mean(fitted, term))))
        contribution = exp.Case().when(complete.copy(), exp.Mul(this=number(term.estimate), expression=centred))
        projections.append(alias(contribution, contribution_column(term.name)))
    return exp.select(*projections).from_(exp.to_table(CHECKED))


def _reason_ranks(names: list[str], contributions: exp.Select) -> exp.Select:
    """Everything of contributions, plus each term's rank among the positive contributions."""
    carried = [column(projection.alias_or_name) for projection in contributions.expressions]
    ranks = [alias(rank_expression(names, index), _rank_column(name)) for index, name in enumerate(names)]
    return exp.select(*carried, *ranks).from_(exp.to_table(CONTRIBUTIONS))


def term_value(fitted: FittedModel, term: FittedTerm) -> exp.Expression:
    """A term's value as DOUBLE from its fitted canonical SQL, hardened like the design table's."""
    return _parsed(fitted, f"term '{term.name}'", term.sql, is_boolean=term.kind == "boolean")


def status_expression(names: list[str], has_offset: bool) -> exp.Expression:
    """'ok', or 'missing: <name>' for the first NULL term in model order (then the offset)."""
    case = exp.Case()
    for name, internal in [*((name, name) for name in names), *([(OFFSET, OFFSET_COLUMN)] if has_offset else [])]:
        case = case.when(column(internal).is_(exp.null()), exp.Literal.string(missing_status(name)))
    return case.else_(exp.Literal.string(OK))


def rank_expression(names: list[str], index: int) -> exp.Expression:
    """The rank of term `index` among the contributions that push the prediction up, NULL for the others.

    1 + the number of terms whose contribution beats it; an earlier term wins a tie. Only positive
    contributions are ranked, so rows spend the comparisons only on the terms that can be reasons.
    """
    this = column(contribution_column(names[index]))
    total: exp.Expression = exp.Literal.number(1)
    for other, name in enumerate(names):
        if other == index:
            continue
        that = column(contribution_column(name))
        beats = exp.GTE(this=that, expression=this.copy()) if other < index else exp.GT(this=that, expression=this.copy())
        total = exp.Add(this=total, expression=exp.Case().when(beats, exp.Literal.number(1)).else_(exp.Literal.number(0)))
    return exp.Case().when(exp.GT(this=this.copy(), expression=number(0.0)), total)


def reason_expression(names: list[str], rank: int) -> exp.Expression:
    """The name of the term ranked `rank` among the positive contributions, or NULL."""
    case = exp.Case()
    for name in names:
        ranked = exp.EQ(this=column(_rank_column(name)), expression=exp.Literal.number(rank))
        case = case.when(ranked, exp.Literal.string(name))
    return case


def score_statement(
    fitted: FittedModel, *, table: str | None = None, reasons: int = 0, as_view: str | None = None, into: str | None = None
) -> exp.Expression:
    """The scoring query, optionally wrapped as CREATE VIEW `as_view` or CREATE TABLE `into` AS."""
    query = score_query(fitted, table=table, reasons=reasons)
    if as_view and into:
        raise FeatpipeError("give --as-view or --into, not both")
    if as_view:
        return exp.Create(this=exp.to_table(as_view), kind="VIEW", expression=query)
    if into:
        return exp.Create(this=exp.to_table(into), kind="TABLE", expression=query)
    return query


def score_header(fitted: FittedModel, fitted_hash: str) -> str:
    """SQL comment lines naming the model, every fingerprint and the fitted file's hash."""
    terms = model_terms(fitted)
    offset = " + offset" if fitted.offset is not None else ""
    lines = [
        f"featpipe scoring query for model '{fitted.model}' ({fitted.family}, {fitted.link} link), input '{fitted.input}'",
        f"fitted file fitted/{fitted.model}.yaml, hash {fitted_hash}; model fingerprint {fitted.fingerprint}",
        "term fingerprints:",
        *(f"  {term.name}: {term.fingerprint}" for term in terms),
        f"linear_predictor = {baseline(fitted)!r}{offset} + SUM(contribution_*) on rows with status 'ok'",
        "(the first number is the linear predictor at the training means).",
        "status 'missing: <term>' names the first NULL term; such rows get no prediction.",
        "Unseen categories take their term expression's value (indicators give 0, the reference level);",
        "values outside the training range are extrapolated by the linear model.",
    ]
    return "".join(f"-- {line}\n" for line in lines)


def render_score(statement: exp.Expression, fitted: FittedModel, fitted_hash: str, dialect: str) -> str:
    """The header comment and the statement rendered for `dialect`, ending with ';'."""
    return score_header(fitted, fitted_hash) + render(statement, dialect) + ";\n"


def _parsed(fitted: FittedModel, what: str, sql: str | None, *, is_boolean: bool) -> exp.Expression:
    """Parse fitted SQL and re-check it against the allow-list: the file may have been edited by hand."""
    if not sql:
        raise FeatpipeError(f"{_source(fitted)}: {what} has no SQL; run `featpipe fit` again")
    try:
        tree = sqlglot.parse_one(sql, dialect=FITTED_DIALECT)
    except (ParseError, TokenError) as error:
        raise FeatpipeError(f"{_source(fitted)}: {what} is not a SQL expression ({str(error).splitlines()[0]}); "
                            "run `featpipe fit` again") from None
    problems = check_allowed(tree, _source(fitted))
    if problems:
        raise FeatpipeError(f"{_source(fitted)}: {what}: {problems[0].message}; run `featpipe fit` again")
    return as_number(harden(tree, schema=fitted.columns), is_boolean)


def _prediction(family: str, eta: exp.Expression) -> exp.Expression:
    try:
        return prediction(family, eta)
    except ValueError as error:
        raise FeatpipeError(f"fitted file: {error}") from None


def _mean(fitted: FittedModel, term: FittedTerm) -> float:
    if term.profile is None:
        raise FeatpipeError(f"{_source(fitted)}: term '{term.name}' has no training profile; run `featpipe fit` again")
    return term.profile.mean


def _rank_column(term: str) -> str:
    return f"_rank_{term}"


def _refuse_clashes(fitted: FittedModel, terms: tuple[FittedTerm, ...]) -> None:
    reserved = {PREDICTION, LINEAR_PREDICTOR, OFFSET, STATUS, *(contribution_column(t.name) for t in terms)}
    if fitted.key in reserved or fitted.key.startswith("reason_") or fitted.key in {t.name for t in terms}:
        raise FeatpipeError(f"{_source(fitted)}: the key column '{fitted.key}' has the name of a scoring output column; "
                            "rename the key column of the input")


def _source(fitted: FittedModel) -> str:
    return f"fitted/{fitted.model}.yaml"
