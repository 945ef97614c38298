"""Scoring API: the exported scoring SQL of a fitted model, and batch scoring inside the engine.

    >>> from featpipe import load_project, scoring
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

from ..compiler import compile_project
from ..engines.compute import Progress, connect
from ..engines.contract import check_contract
from ..errors import FeatpipeError
from ..project import PROJECT_FILE, InputSpec, Project
from ..sqlgen.common import check_dialect, column
from ..sqlgen.score import STATUS, render_score, score_query, score_statement
from . import FittedModel, file_hash, read_fitted, staleness


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
    statement = score_statement(fitted, table=table, reasons=reasons, as_view=as_view, into=into)
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
    fitted = load_fitted(project, model)
    if into == table:
        raise FeatpipeError(f"--into '{into}' is the table being scored; write the scores to another table")
    stale = _staleness(project, fitted)
    if stale and not allow_stale:
        raise FeatpipeError(f"fitted/{model}.yaml is stale: {'; '.join(stale)}; "
                            f"run `featpipe fit -p {project.root} {model}` "
                            "or pass --allow-stale to score with the fitted definitions anyway")
    contract = scoring_contract(project.inputs[fitted.input], fitted)
    query = score_query(fitted, table=table, reasons=reasons)
    with connect(project) as engine:
        check_contract(contract, table, engine.describe(table), engine.name)
        if progress:
            progress(f"scoring {table} into {into} with {engine.name}")
        engine.create_table(into, query)
        counts = engine.fetch(_status_counts(into))
    status = {name: int(count) for name, count in counts}
    return ScoreResult(model, table, into, sum(status.values()), status, tuple(stale))


def _staleness(project: Project, fitted: FittedModel) -> list[str]:
    compiled = compile_project(project)
    if fitted.model not in compiled.models:
        return [f"specs/{fitted.model}.yaml no longer exists"]
    return staleness(fitted, compiled.models[fitted.model])


def _status_counts(table: str) -> exp.Select:
    return (
        exp.select(column(STATUS), exp.Count(this=exp.Star()))
        .from_(exp.to_table(table))
        .group_by(column(STATUS))
        .order_by(column(STATUS))
    )
