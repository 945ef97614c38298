"""`featpipe evaluate`: a fitted model measured on a labelled table, as a whole and per period.

The labelled table is a declared input (so its contract is checked before anything runs) with the
target and every column the model reads, declared with the model input's types. It is scored in the
engine by the model's design query and the fitted coefficients, and measured with the holdout metric
function itself (featpipe.fitting.metrics), so an evaluation reports exactly what a holdout does.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

from ..compiler import compile_project
from ..engines.base import Engine
from ..engines.builds import read_builds, record_builds
from ..engines.compute import Progress, connect, prepare_inputs, say
from ..errors import FeatpipeError
from ..fitted import FittedModel, file_hash
from ..fitted.current import refuse_if_stale
from ..fitted.evaluations import Evaluation, evaluation_path, write_evaluation
from ..fitted.scoring import load_fitted
from ..project import PROJECT_FILE, InputSpec, Project
from ..compiler.layout import DesignLayout
from ..sqlgen.batches import (
    evaluation_query,
    period_expression,
    period_flag,
    period_label,
    periods_query,
    row_count_query,
)
from ..sqlgen.metrics import scored_holdout
from .groups import group_tables
from .metrics import holdout_metrics


def evaluate(project: Project, model: str, table: str, by: str | None = None,
             progress: Progress | None = None) -> tuple[Evaluation, Path]:
    """Measure fitted/MODEL.yaml on `table` (per period with `by`) and write fitted/MODEL.evaluations/TABLE.yaml.

    Refuses a stale fit, a table that is not a declared input, and one whose columns do not carry
    what the model reads and its target.
    """
    fitted = load_fitted(project, model)
    refuse_if_stale(project, fitted)
    compiled = compile_project(project).models[model]
    labelled = labelled_input(project, fitted, table)
    period = period_expression(by, labelled.columns) if by is not None else None
    path = project.fitted_path(model)
    with connect(project) as engine:
        recorded = read_builds(engine)
        builds = dict(recorded)
        prepare_inputs(engine, project, {table}, builds, progress)
        record_builds(engine, builds, recorded)
        say(progress, f"evaluating {model} on {table}" + (f" by {by}" if by else ""))
        periods = [row[0] for row in engine.fetch(periods_query(period, table))] if period is not None else []
        scratch = f"evaluation_{model}"
        engine.create_table(scratch, evaluation_query(compiled, project.inputs[fitted.input], table, period, periods))
        try:
            evaluation = _measure(engine, fitted, compiled.layout, scratch, table, by, periods, file_hash(path))
            evaluation = replace(evaluation, group_tables=group_tables(
                engine, scored_holdout(replace(compiled.layout, table=scratch), fitted.coefficients), table,
                compiled.layout.key, compiled.spec.groups, fitted.family, fitted.threshold))
        finally:
            engine.drop_table(scratch)
    target = evaluation_path(path, table)
    return write_evaluation(target, evaluation), target


def labelled_input(project: Project, fitted: FittedModel, table: str) -> InputSpec:
    """The declared input `table`, refused unless it declares the target and the model's columns as the model's input does."""
    if table not in project.inputs:
        raise FeatpipeError(f"--table {table}: not an input of {PROJECT_FILE}; declare it under inputs (its key, load file "
                            f"and columns, with the target '{fitted.target}') so featpipe checks it before evaluating")
    declared = project.inputs[table].columns
    wanted = {**fitted.columns, fitted.target: project.inputs[fitted.input].columns[fitted.target]}
    problems = [f"'{name}' is missing" if name not in declared else f"'{name}' is {declared[name]}, not {kind}"
                for name, kind in wanted.items() if declared.get(name, "").upper() != kind.upper()]
    if problems:
        raise FeatpipeError(f"{PROJECT_FILE}: input '{table}' cannot be evaluated with model '{fitted.model}': "
                            f"{'; '.join(problems)}; declare the columns as input '{fitted.input}' does")
    return project.inputs[table]


def _measure(engine: Engine, fitted: FittedModel, layout: DesignLayout, scratch: str, table: str, by: str | None,
             periods: list, fitted_hash: str) -> Evaluation:
    layout = replace(layout, table=scratch)

    def metrics(flag: str) -> dict:
        return holdout_metrics(engine, replace(layout, holdout=flag), fitted.family, fitted.coefficients, fitted.threshold,
                               counted, power=fitted.fit.get("power"))

    counted = isinstance(fitted.weights, dict) and fitted.weights.get("kind") == "frequency"  # rows the weights stand for

    ((rows,),) = engine.fetch(row_count_query(scratch))
    return Evaluation(
        model=fitted.model, table=table, fitted=fitted_hash, fingerprint=fitted.fingerprint, by=by,
        table_rows=int(rows), metrics=metrics(layout.holdout),
        periods=tuple({"period": period_label(value, by), "metrics": metrics(period_flag(index))}
                      for index, value in enumerate(periods, start=1)),
    )

