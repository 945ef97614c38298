"""Learned terms in a fit: learn their constants from the training rows, expand them into design
columns in the engine, and describe each term's columns and joint Wald test for the fitted file.

A model's design table keeps each learned term's argument; here the constants are learned (levels in
one query; all quantiles from a count and the values at their ranks, featpipe.fitting.order_statistics) and the table `design_<model>__columns` is built
from it with every learned term replaced by its columns (`_<term>__<j>`). The GLM, the profiles and
the holdout metrics then read that table as they read any design table.
"""

from __future__ import annotations

import dataclasses
import math

from sqlglot import exp

from ..compiler import CompiledModel
from ..compiler.layout import DesignLayout
from ..engines.base import Engine
from ..errors import FeatpipeError
from ..fitted.notes import effect
from ..sqlgen.common import alias, column, training_rows
from ..sqlgen.learned import (
    LearnedConstants,
    design_columns,
    levels_query,
    quantile_ranks,
    read_levels,
    unseen_holdout_query,
    read_quantiles,
)
from .order_statistics import non_null_counts, values_at_ranks

COLUMNS_SUFFIX = "__columns"


def column_names(term: str, count: int) -> list[str]:
    """Design-column names of a learned term of `count` columns; no term name holds '__', so they never clash."""
    return [f"_{term}__{index}" for index in range(1, count + 1)]


def learn_constants(engine: Engine, model: CompiledModel) -> dict[str, LearnedConstants]:
    """Each learned term's constants, from the model's training rows only."""
    layout = model.layout
    learned = {term.name: term.learned for term in model.terms if term.learned}
    levels = [name for name, call in learned.items() if call.function == "LEVELS"]
    quantiled = {name: call for name, call in learned.items() if call.function != "LEVELS"}
    constants: dict[str, LearnedConstants] = {}
    if levels:
        counted: dict[str, list] = {name: [] for name in levels}
        for name, level, rows in engine.fetch(levels_query(layout, levels)):
            counted[name].append((level, rows))
        constants.update({name: read_levels(learned[name], counted[name]) for name in levels})
    if quantiled:
        arguments, training = {name: column(name) for name in quantiled}, training_rows(layout)
        counts = non_null_counts(engine, layout, arguments, training)
        ranks = {name: quantile_ranks(call, counts[name]) for name, call in quantiled.items()}
        found = values_at_ranks(engine, layout, arguments, counts, ranks, training)
        constants.update({name: read_quantiles(call, [found[name][rank] for rank in ranks[name]])
                          for name, call in quantiled.items()})
    for name in learned:
        _refuse_degenerate(model, name, constants[name])
    return {name: constants[name] for name in learned}


def unseen_holdout_rows(engine: Engine, model: CompiledModel, constants: dict[str, LearnedConstants]) -> dict[str, int]:
    """Per LEVELS term, the holdout rows whose level the training rows never had (the row accounting's
    `unseen`). Without an `other` group such a row has no prediction (scoring says `unseen: TERM`), so it
    is left out of the holdout metrics; with one it is scored as `other`."""
    levels = {name: found for name, found in constants.items() if found.call.function == "LEVELS"}
    if not levels:
        return {}
    (row,) = engine.fetch(unseen_holdout_query(model.layout, levels))
    return {name: int(count or 0) for name, count in zip(levels, row, strict=True)}


def _refuse_degenerate(model: CompiledModel, name: str, constants: LearnedConstants) -> None:
    call, where = constants.call, f"{model.spec.display}: term '{name}'"
    if call.function == "LEVELS" and not constants.columns:
        raise FeatpipeError(f"{where} ({call.function}) has fewer than two levels with at least "
                            f"{call.arguments[0]} training rows; lower min_rows or drop the term")
    if call.function in ("BINS", "SPLINE", "CAPPED") and any(math.isnan(v) for v in constants.values) or \
            call.function == "CAPPED" and not constants.values:
        raise FeatpipeError(f"{where} ({call.function}) has no training values; check its input")
    if call.function == "SPLINE" and len(constants.values) < 3:
        raise FeatpipeError(f"{where} (SPLINE) has only {len(constants.values)} distinct knots on the training rows; "
                            "use fewer knots, or BINS for a variable with few values")


def profiled_arguments(constants: dict[str, LearnedConstants]) -> list[str]:
    """Learned terms profiled by their argument: BINS and SPLINE, whose several columns have no one value
    to profile (drift bins the argument, the report draws over its range). CAPPED is profiled as its one
    column, LEVELS by its levels' rows."""
    return [name for name, found in constants.items() if found.call.function in ("BINS", "SPLINE")]


def expand(engine: Engine, model: CompiledModel, constants: dict[str, LearnedConstants]) -> DesignLayout:
    """Build the table of design columns and return its layout (the GLM's names are its columns)."""
    layout = model.layout
    table = f"{layout.table}{COLUMNS_SUFFIX}"
    carried = [layout.key, layout.target, *(c for c in (layout.offset, layout.weight) if c), layout.holdout]
    projections = [column(name) for name in carried]
    names = []
    for term in model.terms:
        if term.name not in constants:
            projections.append(column(term.name))
            names.append(term.name)
            continue
        if term.name in profiled_arguments(constants):  # the argument too, for its training profile
            projections.append(column(term.name))
        expanded = column_names(term.name, len(constants[term.name].labels))
        projections += [alias(value, name) for value, name in
                        zip(design_columns(constants[term.name], column(term.name)), expanded, strict=True)]
        names += expanded
    engine.create_table(table, exp.select(*projections).from_(exp.to_table(layout.table)))
    return dataclasses.replace(layout, table=table, terms=tuple(names))


def learned_entry(term: str, constants: LearnedConstants, coefficients, covariance, names, family: str,
                  means: dict[str, float], data: str) -> dict:
    """The fitted file's `learned` record of a term: constants, one entry per column, joint Wald test,
    and `data`, the signature of the input the constants were learned from (engines.builds).

    `coefficients` are the GLM's (intercept first), `covariance` its matrix (None when penalized) in
    the order of `names`.
    """
    call = constants.call
    expanded = column_names(term, len(constants.labels))
    positions = [names.index(name) for name in expanded]
    columns = []
    for label, name, position in zip(constants.labels, expanded, positions, strict=True):
        coefficient = coefficients[position]
        figures = coefficient.inference_figures()
        reading = effect(family, coefficient.estimate, figures["ci_low"], figures["ci_high"], 1.0)
        columns.append({"label": label, "estimate": coefficient.estimate, **figures, "mean": means[name],
                        "reading": _reading(constants, label, reading)})
    entry = {"function": call.function, "arguments": list(call.arguments)}
    if call.function == "LEVELS":
        entry["levels"] = [{"level": level, "rows": rows} for level, rows in constants.levels]
        entry["reference"] = constants.reference
        entry["pooled"] = list(constants.pooled)
    else:
        entry["values"] = list(constants.values)
    entry["columns"] = columns
    entry["wald"] = _wald(covariance, positions, [coefficients[p].estimate for p in positions])
    entry["data"] = data
    return entry


def _reading(constants: LearnedConstants, label: str, reading) -> str:
    interval = "" if reading.low is None else f" ({reading.low:.3g} to {reading.high:.3g})"
    if constants.call.function == "LEVELS":
        return f"{label} vs {constants.reference} (reference): {reading.kind} {reading.value:.3g}{interval}"
    if constants.call.function == "BINS":
        return f"{label} vs bin 1 (reference): {reading.kind} {reading.value:.3g}{interval}"
    return f"{label}: {reading.kind} {reading.value:.3g} per unit{interval}"


def _wald(covariance, positions: list[int], estimates: list[float]) -> dict | None:
    """Joint Wald test that every column of the term is 0: b' V^-1 b against chi-square(df)."""
    if covariance is None:
        return None
    import numpy as np
    from scipy.special import chdtrc  # what scipy.stats' chi2.sf calls, without importing scipy.stats in a fit

    block = np.array([[covariance[i][j] for j in positions] for i in positions])
    b = np.array(estimates)
    statistic = float(b @ np.linalg.solve(block, b))
    return {"statistic": statistic, "df": len(positions), "p_value": float(chdtrc(len(positions), statistic))}
