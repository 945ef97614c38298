"""Scoring API: the exported scoring SQL of a fitted model, and batch scoring inside the engine.

    >>> from featpipe import load_project
    >>> from featpipe.fitted import scoring
    >>> project = load_project("projects/lease_default")                              # doctest: +SKIP
    >>> print(scoring.render_score_sql(project, "default_risk", dialect="postgres"))  # doctest: +SKIP
    >>> scoring.score(project, "default_risk", table="new_leases", into="scores")     # doctest: +SKIP

The SQL is built from fitted/MODEL.yaml alone, so exporting it never compiles the term files and a
later edit of a term cannot change it. Scoring in the engine does compile them, to refuse a model
whose terms changed since it was fitted (unless allowed).
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlglot import exp

from ..engines.compute import Progress, connect
from ..engines.contract import check_contract, check_key
from ..errors import FeatpipeError
from ..project import PROJECT_FILE, InputSpec, Project
from ..project.names import (
    INTERCEPT,
    LINEAR_PREDICTOR,
    STATUS,
    contribution_column,
    reserved_reason,
    scoring_clash,
    table_reference,
)
from ..sqlgen.common import check_dialect, column, render
from ..sqlgen.score import (
    OK,
    ScoringModel,
    ScoringTerm,
    baseline,
    score_query,
    score_statement,
)
from ..compiler.learned import LearnedCall
from ..sqlgen.learned import LearnedConstants
from . import FittedModel, FittedTerm, file_hash, read_fitted
from .current import refuse_if_stale


@dataclass(frozen=True)
class ScoreResult:
    model: str
    table: str  # the table that was scored
    into: str  # the table written
    rows: int
    status: dict[str, int]  # rows per status ('ok', 'missing: <term>', ...), sorted by status
    stale: tuple[str, ...] = ()  # why the model is stale, when scoring was allowed anyway

    def as_dict(self) -> dict:
        return {"model": self.model, "table": self.table, "into": self.into, "rows": self.rows,
                "status": self.status, "stale": list(self.stale)}


def fitted_source(fitted: FittedModel) -> str:
    return f"fitted/{fitted.model}.yaml"


def scoring_model(fitted: FittedModel) -> ScoringModel:
    """What the scoring and drift queries need of a fitted file, checked first: the file may have been
    edited by hand, and its names become the output columns' names.

    Refuses a file whose first term is not the intercept, a term without a training profile, a term
    or key named like a column the queries write, and names that repeat.
    """
    source = fitted_source(fitted)
    if not fitted.terms or fitted.terms[0].name != INTERCEPT:
        raise FeatpipeError(f"{source}: the first term must be '{INTERCEPT}'; run `featpipe fit` again")
    names = [term.name for term in fitted.model_terms]
    for name in names:
        clash = reserved_reason(name)
        if clash:
            raise FeatpipeError(f"{source}: term name '{name}' {clash}; rename the term and run `featpipe fit` again")
    clash = scoring_clash(fitted.key)
    if clash:
        raise FeatpipeError(f"{source}: key column '{fitted.key}' {clash}; key the input by another column")
    repeated = sorted({name for name in names if names.count(name) > 1} | ({fitted.key} & set(names)))
    if repeated:
        raise FeatpipeError(f"{source}: '{repeated[0]}' names two columns of the model; run `featpipe fit` again")
    for term in fitted.model_terms:
        if term.profile is None and term.learned is None:
            raise FeatpipeError(f"{source}: term '{term.name}' has no training profile; run `featpipe fit` again")
    terms = []
    for term in fitted.model_terms:
        if term.learned is None:
            terms.append(ScoringTerm(term.name, term.sql, term.kind == "boolean", term.estimate, term.profile.mean))
        else:
            terms += learned_scoring_terms(term)
    return ScoringModel(
        key=fitted.key, table=fitted.input, family=fitted.family, intercept=fitted.terms[0].estimate,
        offset=fitted.offset, columns=fitted.columns, source=source, terms=tuple(terms),
    )


def learned_constants(term: FittedTerm) -> LearnedConstants:
    """A learned term's constants as its fitted file records them."""
    learned = term.learned
    call = LearnedCall(learned["function"], tuple(learned["arguments"]))
    labels = tuple(item["label"] for item in learned["columns"])
    if call.function == "LEVELS":
        return LearnedConstants(call, tuple((item["level"], item["rows"]) for item in learned["levels"]),
                                learned["reference"], labels, tuple(learned["pooled"]))
    return LearnedConstants(call, values=tuple(learned["values"]))


def learned_scoring_terms(term: FittedTerm) -> list[ScoringTerm]:
    """One scoring column per design column of a learned term, named as the fit named them."""
    constants = learned_constants(term)
    return [ScoringTerm(f"_{term.name}__{index + 1}", term.sql, False, item["estimate"], item["mean"],
                        term=term.name, learned=constants, index=index, kind=term.kind)
            for index, item in enumerate(term.learned["columns"])]


def score_header(fitted: FittedModel, fitted_hash: str) -> str:
    """SQL comment lines naming the model, every fingerprint and the fitted file's hash."""
    offset = " + offset" if fitted.offset is not None else ""
    lines = [
        f"featpipe scoring query for model '{fitted.model}' ({fitted.family}, {fitted.link} link), input '{fitted.input}'",
        f"fitted file {fitted_source(fitted)}, hash {fitted_hash}; model fingerprint {fitted.fingerprint}",
        "term fingerprints:",
        *(f"  {term.name}: {term.fingerprint}" for term in fitted.model_terms),
        (f"{LINEAR_PREDICTOR} = {baseline(scoring_model(fitted))!r}{offset} + SUM({contribution_column('*')}) "
         f"on rows with {STATUS} '{OK}'"),
        "(the first number is the linear predictor at the training means).",
        f"{STATUS} 'missing: <term>' names the first NULL term; such rows get no prediction.",
        "Unseen categories take their term expression's value (indicators give 0, the reference level);",
        "values outside the training range are extrapolated by the linear model.",
    ]
    return sql_comment(lines)


def sql_comment(lines: list[str]) -> str:
    """`lines` as SQL line comments. A line break inside a line would end its comment and turn the rest
    into SQL, so one is refused as a bug: header lines hold validated values only (fitted/validate.py)."""
    for line in lines:
        if line.splitlines() not in ([line], []):
            raise AssertionError(f"a SQL comment line holds a line break: {line!r}")
    return "".join(f"-- {line}\n" for line in lines)


def render_score(statement: exp.Expression, fitted: FittedModel, fitted_hash: str, dialect: str) -> str:
    """The header comment and the statement rendered for `dialect`, ending with ';'."""
    return score_header(fitted, fitted_hash) + render(statement, dialect) + ";\n"


def load_fitted(project: Project, model: str) -> FittedModel:
    fitted = read_fitted(project.fitted_path(model))
    if fitted.input not in project.inputs:
        raise FeatpipeError(f"fitted/{model}.yaml reads input '{fitted.input}', which {PROJECT_FILE} no longer declares; "
                            "declare it again or fit the model again")
    return fitted


def render_score_sql(
    project: Project, model: str, *, dialect: str = "duckdb", table: str | None = None, reasons: int = 0,
    as_view: str | None = None, into: str | None = None,
) -> str:
    """The scoring SQL of fitted/MODEL.yaml for `dialect`, with its header comment."""
    check_dialect(dialect)
    fitted = load_fitted(project, model)
    statement = score_statement(scoring_model(fitted), table=table, reasons=reasons, as_view=as_view, into=into)
    return render_score(statement, fitted, file_hash(project.fitted_path(model)), dialect)


def scoring_contract(source: InputSpec, fitted: FittedModel) -> InputSpec:
    """The part of the input's contract the scoring query reads: the key and the columns of its terms.

    A table to score need not hold the target or columns no term uses.
    """
    read = set(fitted.columns)
    undeclared = sorted(read - set(source.columns))
    if undeclared:
        raise FeatpipeError(f"{PROJECT_FILE}: fitted/{fitted.model}.yaml reads column(s) {', '.join(undeclared)} "
                            f"that input '{source.name}' no longer declares; declare them again or fit the model again")
    return InputSpec(source.name, source.key, {name: kind for name, kind in source.columns.items() if name in read})


def score(
    project: Project, model: str, *, table: str, into: str, reasons: int = 0, allow_stale: bool = False,
    progress: Progress | None = None,
) -> ScoreResult:
    """Score `table` with fitted/MODEL.yaml inside the project's engine and write `into` atomically.

    Refuses, before anything is written: a model whose definitions changed since its fit (unless
    `allow_stale`), a table that does not meet the input's column contract, and `into` == `table`.
    """
    target = table_reference(into, "--into")
    if table_reference(table, "--table") == target:
        raise FeatpipeError(f"--into '{into}' is the table being scored; write the scores to another table")
    fitted = load_fitted(project, model)
    stale = refuse_if_stale(project, fitted, allow_stale=allow_stale)
    contract = scoring_contract(project.inputs[fitted.input], fitted)
    query = score_query(scoring_model(fitted), table=table, reasons=reasons)
    with connect(project) as engine:
        check_contract(contract, table, engine.describe(table), engine.name)
        check_key(engine, table, fitted.key, f"{engine.name} table '{table}'")
        if progress:
            progress(f"scoring {table} into {into} with {engine.name}")
        engine.create_table(into, query)
        counts = engine.fetch(_status_counts(target))
    status = {name: int(count) for name, count in counts}
    return ScoreResult(model, table, into, sum(status.values()), status, stale)


def _status_counts(table: exp.Table) -> exp.Select:
    return (
        exp.select(column(STATUS), exp.Count(this=exp.Star()))
        .from_(table)
        .group_by(column(STATUS))
        .order_by(column(STATUS))
    )
