"""What the report shows, gathered in the engine: ranges, medians, samples, and predictions on grids.

Effect curves and decision surfaces are the model's own scoring query run over grid tables the
engine holds (every contract column, typed as the contract says), so a curve bends where production
would bend: a ratio or an interaction term makes a linear model curved in its raw inputs. Grid and
row tables are temporary, named `featpipe_report_*`, and dropped when the report is gathered, also
when a query fails.

Training rows here are exactly the fit's: the design table's hash split (same salt and fraction) and
every term, the target, the offset and the weight present. The 1st and 99th percentiles bound each
numeric grid, so that a few extreme values do not squash the picture; the rug shows the rest.
"""

from __future__ import annotations

import contextlib
import math
import os
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field

import numpy as np
from sqlglot import exp

from ...engines.base import Engine
from ...errors import FeatpipeError
from ...project import InputSpec
from ...project.names import PREDICTION
from ...sqlgen.ranks import RankSums, rank_components_query, read_rank_sums
from .. import FittedModel
from ..scoring import scoring_contract
from . import queries
from .queries import OBSERVED, PREDICTED

CURVE_POINTS = 81
SURFACE_POINTS = 48
MAX_LEVELS = 12
RUG_ROWS = 400
POINT_ROWS = 400
NUMERIC, INTEGER, LEVELS = "numeric", "integer", "levels"
STRIDE = 100_000  # grid keys: block * STRIDE + position


@dataclass(frozen=True)
class InputRange:
    """A raw input over the training rows: numeric ones with percentiles, the others with their levels."""

    name: str
    kind: str  # "numeric", "integer" or "levels"
    minimum: float | None = None
    low: float | None = None  # 1st percentile
    median: float | None = None
    high: float | None = None  # 99th percentile
    maximum: float | None = None
    levels: tuple = ()  # most frequent first (levels only)
    counts: tuple[int, ...] = ()

    @property
    def held(self):
        """The value this input is held at while another one moves: its median (rounded for whole
        numbers), or its most frequent level."""
        if self.kind == LEVELS:
            return self.levels[0] if self.levels else None
        if self.median is None:
            return None
        return int(math.floor(self.median + 0.5)) if self.kind == INTEGER else self.median

    def grid(self, points: int) -> list:
        """Values spanning the 1st to 99th percentile (the whole range when those coincide)."""
        if self.kind == LEVELS:
            return list(self.levels)
        if self.minimum is None:
            return []
        low, high = (self.low, self.high) if self.high > self.low else (self.minimum, self.maximum)
        values = np.linspace(low, high, points) if high > low else np.array([low])
        if self.kind == INTEGER:
            return sorted({int(math.floor(value + 0.5)) for value in values})
        return [float(value) for value in values]


@dataclass(frozen=True)
class Curve:
    """One input moved over its grid, the others held; predictions per model, and training values."""

    column: str
    kind: str
    x: tuple
    predictions: dict[str, tuple[float | None, ...]]
    rug: tuple  # a sample of training values
    range: InputRange


@dataclass(frozen=True)
class Surface:
    a: str
    b: str
    xs: tuple[float, ...]
    ys: tuple[float, ...]
    predictions: dict[str, np.ndarray]  # per model: rows follow ys, columns follow xs
    points: tuple[tuple[float, float, float, float], ...]  # held-out (a, b, observed, prediction)
    combining: dict[str, tuple[str, ...]]  # per model: the terms that read both inputs


@dataclass(frozen=True)
class ModelFigures:
    """Per-model figures computed on its held-out rows by its scoring SQL."""

    train_rows: int
    holdout_rows: int
    score_bins: tuple[tuple[int, int, float], ...] = ()  # binomial: (bin, rows, events)
    residual_deciles: tuple[dict, ...] = ()  # poisson/gaussian


@dataclass(frozen=True)
class ReportData:
    fitted: FittedModel
    other: FittedModel | None
    figures: ModelFigures
    held: dict[str, object]
    ranges: dict[str, InputRange]
    curves: tuple[Curve, ...]
    surface: Surface | None
    surface_note: str  # why there is no surface, when there is none
    shared_rows: tuple[int, int, int] | None  # training rows of the model, of the other, of both
    inputs: tuple[str, ...] = field(default=())  # raw inputs the terms read, in model order
    shared_holdout: tuple[int, int, int] | None = None  # held-out rows of the model, of the other, of both
    auc_sums: RankSums | None = None  # DeLong's sums of both models' predictions on the common held-out rows
    learned: dict = field(default_factory=dict)  # by term: the figure of each learned term (report/learned.py)


def term_inputs(fitted: FittedModel) -> list[str]:
    """Input columns the terms read, in the order the terms first read them."""
    seen: dict[str, None] = {}
    for term in fitted.model_terms:
        for name in term.columns:
            if name != fitted.key:
                seen.setdefault(name, None)
    return list(seen)


def default_pair(fitted: FittedModel, numeric: set[str]) -> tuple[str, str] | None:
    """The two numeric inputs read together by the most terms (earlier inputs win ties); with no term
    reading two, the first two numeric inputs."""
    inputs = [name for name in term_inputs(fitted) if name in numeric]
    if len(inputs) < 2:
        return None
    best, best_count = (inputs[0], inputs[1]), 0
    for i, a in enumerate(inputs):
        for b in inputs[i + 1:]:
            count = sum(a in term.columns and b in term.columns for term in fitted.model_terms)
            if count > best_count:
                best, best_count = (a, b), count
    return best


def gather(
    engine: Engine, source: InputSpec, fitted: FittedModel, other: FittedModel | None = None,
    pair: tuple[str, str] | None = None,
) -> ReportData:
    """Everything the report draws for `fitted` (and `other`, compared on the same grids)."""
    models = [fitted] + ([other] if other else [])
    needed = list(dict.fromkeys(name for model in models for name in scoring_contract(source, model).columns))
    inputs = list(dict.fromkeys(name for model in models for name in term_inputs(model)))
    kinds = {name: _kind(source.columns[name]) for name in needed if name != fitted.key}
    if pair is not None:
        _check_pair(pair, kinds, source)
    with _tables(engine) as temporary:
        rows_table = temporary("rows")
        engine.create_table(rows_table, queries.rows_query(fitted, source, needed))
        train, holdout = (int(value or 0) for value in engine.fetch(queries.counts_query(rows_table))[0])
        if train == 0:
            raise FeatpipeError(f"fitted/{fitted.model}.yaml: no training rows of input '{source.name}' can be scored "
                                "now; load the data again or fit the model again")
        ranges = _ranges(engine, rows_table, kinds)
        held = {name: ranges[name].held for name in kinds}
        rug = _sample(engine, rows_table, fitted.key, inputs, queries.training(), RUG_ROWS)
        curves = _curves(engine, temporary("curves"), source, fitted.key, models, inputs, ranges, held, rug)
        chosen = pair or default_pair(fitted, {name for name, kind in kinds.items() if kind != LEVELS})
        surface, note = None, "the model's terms read fewer than two numeric inputs"
        if chosen is not None:
            surface = _surface(engine, temporary("surface"), rows_table, source, models, chosen, ranges, held)
            note = ""
        figures = _figures(engine, rows_table, fitted, train, holdout)
        shared = shared_holdout = auc_sums = None
        if other is not None:
            shared, shared_holdout, auc_sums = _shared(engine, rows_table, source, fitted, other)
        from .learned import learned_figures

        learned = learned_figures(engine, fitted)
    return ReportData(fitted, other, figures, held, ranges, tuple(curves), surface, note, shared, tuple(inputs),
                      shared_holdout, auc_sums, learned)



def _shared(engine: Engine, rows_table: str, source: InputSpec, fitted: FittedModel, other: FittedModel):
    """Training and held-out rows of each model and of both, and for two binomial models on the same
    held-out rows DeLong's sums of their predictions there."""
    other_rows = queries.rows_query(other, source, [])
    shared, shared_holdout = (
        tuple(int(value or 0) for value in engine.fetch(queries.shared_rows_query(rows_table, fitted.key, other_rows, held))[0])
        for held in (False, True)
    )
    auc_sums = None
    if fitted.family == other.family == "binomial" and shared_holdout[0] == shared_holdout[1] == shared_holdout[2] > 0:
        paired = queries.paired_scores_query(rows_table, fitted.key, other_rows)
        found = engine.fetch(rank_components_query(paired, [queries.FIRST_SCORE, queries.SECOND_SCORE]))
        auc_sums = read_rank_sums(found, 2)
    return shared, shared_holdout, auc_sums


@contextlib.contextmanager
def _tables(engine: Engine) -> Iterator:
    """Names for temporary tables, each dropped on the way out."""
    made: list[str] = []

    def name(purpose: str) -> str:
        table = f"featpipe_report_{purpose}_{os.getpid()}"
        made.append(table)
        return table

    try:
        yield name
    finally:
        for table in made:
            engine.drop_table(table)


def _kind(declared: str) -> str:
    kind = exp.DataType.build(declared, dialect="duckdb")
    if kind.is_type(*exp.DataType.INTEGER_TYPES):
        return INTEGER
    if kind.is_type(*exp.DataType.NUMERIC_TYPES):
        return NUMERIC
    return LEVELS


def _check_pair(pair: tuple[str, str], kinds: dict[str, str], source: InputSpec) -> None:
    if len(pair) != 2 or pair[0] == pair[1]:
        raise FeatpipeError(f"--pair needs two different input columns as a,b; got {','.join(pair)}")
    for name in pair:
        if name not in source.columns:
            raise FeatpipeError(f"--pair: input '{source.name}' has no column '{name}'; "
                                f"its columns: {', '.join(source.columns)}")
        if name not in kinds:
            raise FeatpipeError(f"--pair: the model's scoring SQL does not read column '{name}'; "
                                f"choose among {', '.join(kinds)}")
        if kinds[name] == LEVELS:
            raise FeatpipeError(f"--pair: column '{name}' is not numeric; a decision surface needs two numeric inputs")


def _ranges(engine: Engine, table: str, kinds: dict[str, str]) -> dict[str, InputRange]:
    numeric = [name for name, kind in kinds.items() if kind != LEVELS]
    ranges = {}
    if numeric:
        row = [None if value is None else float(value) for value in engine.fetch(queries.ranges_query(table, numeric))[0]]
        for index, name in enumerate(numeric):
            minimum, low, median, high, maximum = row[5 * index: 5 * index + 5]
            ranges[name] = InputRange(name, kinds[name], minimum, low, median, high, maximum)
    for name, kind in kinds.items():
        if kind == LEVELS:
            found = engine.fetch(queries.levels_query(table, name, MAX_LEVELS))
            ranges[name] = InputRange(name, kind, levels=tuple(value for value, _ in found),
                                      counts=tuple(int(count) for _, count in found))
    return {name: ranges[name] for name in kinds}


def _sample(engine: Engine, table: str, key: str, columns: Sequence[str], where: exp.Expression, rows: int) -> dict[str, tuple]:
    if not columns:
        return {}
    found = engine.fetch(queries.sample_query(table, key, columns, where, rows))
    return {name: tuple(row[index] for row in found if row[index] is not None) for index, name in enumerate(columns)}


def _curves(
    engine: Engine, grid_table: str, source: InputSpec, key: str, models: Sequence[FittedModel], inputs: Sequence[str],
    ranges: dict[str, InputRange], held: dict[str, object], rug: dict[str, tuple],
) -> list[Curve]:
    """One grid table holding every input's curve (block b of keys for input b), scored by each model."""
    blocks, grids = [], {}
    for block, name in enumerate(inputs):
        grids[name] = ranges[name].grid(CURVE_POINTS)
        if grids[name]:
            blocks.append(queries.grid_query(key, source.columns[key], source.columns, [(name, grids[name])], held, block * STRIDE))
    if not blocks:
        return []
    engine.create_table(grid_table, queries.union_all(blocks))
    scored = {model.model: _grid_predictions(engine, model, grid_table) for model in models}
    curves = []
    for block, name in enumerate(inputs):
        keys = [block * STRIDE + position for position in range(len(grids[name]))]
        predictions = {model: tuple(scores.get(k) for k in keys) for model, scores in scored.items()}
        curves.append(Curve(name, ranges[name].kind, tuple(grids[name]), predictions, rug.get(name, ()), ranges[name]))
    return curves


def _grid_predictions(engine: Engine, fitted: FittedModel, grid_table: str) -> dict[int, float | None]:
    frame = engine.fetch_frame(queries.grid_scores_query(fitted, grid_table, []))
    return {int(k): (None if p is None or (isinstance(p, float) and math.isnan(p)) else float(p))
            for k, p in zip(frame[fitted.key], frame[PREDICTION])}


def _surface(
    engine: Engine, grid_table: str, rows_table: str, source: InputSpec, models: Sequence[FittedModel],
    pair: tuple[str, str], ranges: dict[str, InputRange], held: dict[str, object],
) -> Surface:
    a, b = pair
    xs, ys = ranges[a].grid(SURFACE_POINTS), ranges[b].grid(SURFACE_POINTS)
    key = models[0].key
    engine.create_table(grid_table, queries.grid_query(key, source.columns[key], source.columns, [(a, xs), (b, ys)], held))
    predictions = {}
    for model in models:
        scores = _grid_predictions(engine, model, grid_table)
        values = np.array([np.nan if scores.get(k) is None else scores[k] for k in range(len(xs) * len(ys))], dtype=float)
        predictions[model.model] = values.reshape(len(ys), len(xs))
    found = engine.fetch(queries.sample_query(rows_table, models[0].key, [a, b, OBSERVED, PREDICTED], queries.held_out(), POINT_ROWS))
    points = tuple((float(x), float(y), float(o), float(p)) for x, y, o, p in found if x is not None and y is not None)
    combining = {model.model: tuple(t.name for t in model.model_terms if a in t.columns and b in t.columns) for model in models}
    return Surface(a, b, tuple(xs), tuple(ys), predictions, points, combining)


def _figures(engine: Engine, table: str, fitted: FittedModel, train: int, holdout: int) -> ModelFigures:
    if holdout == 0:
        return ModelFigures(train, holdout)
    if fitted.link == "logit":
        bins = tuple((int(b), int(rows), float(events)) for b, rows, events in engine.fetch(queries.score_bins_query(table)))
        return ModelFigures(train, holdout, score_bins=bins)
    names = ("decile", "rows", "mean_predicted", "mean_observed", "q10", "q25", "q50", "q75", "q90")
    deciles = tuple(
        {name: (int(value) if name in ("decile", "rows") else float(value)) for name, value in zip(names, row)}
        for row in engine.fetch(queries.residual_deciles_query(table, fitted.key, fitted.family, fitted.fit.get("power")))
    )
    return ModelFigures(train, holdout, residual_deciles=deciles)


def roc_points(score_bins: Sequence[tuple[int, int, float]]) -> tuple[list[float], list[float]]:
    """False and true positive rates as the threshold falls through the prediction bins (highest first)."""
    events = sum(e for _, _, e in score_bins)
    non_events = sum(rows - e for _, rows, e in score_bins)
    false_positive, true_positive = [0.0], [0.0]
    caught, false_alarms = 0.0, 0.0
    for _, rows, event_count in sorted(score_bins, reverse=True):
        caught += event_count
        false_alarms += rows - event_count
        false_positive.append(false_alarms / non_events if non_events else 0.0)
        true_positive.append(caught / events if events else 0.0)
    return false_positive, true_positive
