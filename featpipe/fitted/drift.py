"""Drift API: how far a batch has moved from a fitted model's training rows, term by term and for the score.

    >>> import featpipe.fitted.drift as drift
    >>> project = featpipe.load_project("projects/lease_default")                      # doctest: +SKIP
    >>> report = drift.drift(project, "default_risk", "leases_2024_06")               # doctest: +SKIP
    >>> report.score.psi, report.score.reading, [row.name for row in report.terms]   # doctest: +SKIP
    >>> print(drift.render_drift_sql(project, "default_risk", "leases_2024_06", "postgres"))  # doctest: +SKIP

Everything is computed in the engine by one query (featpipe.sqlgen.drift), the stability index
included, so the SQL a warehouse runs without Python gives the same numbers; Python only reads the
row and names the reading. Like scoring, drift refuses a stale model (unless allowed) and a table that
does not meet the input's column contract.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

from ..engines.compute import Progress, connect
from ..engines.contract import check_contract
from ..errors import FeatpipeError
from ..project import Project
from ..project.names import (
    LINEAR_PREDICTOR,
    NULL_BIN,
    ROWS,
    above_column,
    below_column,
    bin_column,
    mean_column,
    mean_contribution_column,
    psi_column,
)
from ..sqlgen.common import check_dialect, render
from ..sqlgen.drift import (
    EMPTY_SHARE,
    Monitored,
    drift_query,
    output_names,
    unseen_levels_query,
)
from . import FittedModel, file_hash
from .current import refuse_if_stale
from .learned import UNSEEN, learned_monitored
from .scoring import (
    fitted_source,
    load_fitted,
    scoring_contract,
    scoring_model,
    sql_comment,
)

# Readings of the stability index (common practice in credit scoring).
MODERATE_FROM, MAJOR_ABOVE = 0.1, 0.25
STABLE, MODERATE, MAJOR = "stable", "moderate shift", "major shift"


def reading(psi: float) -> str:
    """below 0.1 stable, 0.1 to 0.25 a moderate shift, above 0.25 a major shift (common practice)."""
    if psi < MODERATE_FROM:
        return STABLE
    return MODERATE if psi <= MAJOR_ABOVE else MAJOR


@dataclass(frozen=True)
class Bin:
    low: float | None  # the bin holds low < value <= high; None: unbounded
    high: float | None
    expected: float  # share of the training rows (NULLs included)
    actual: float  # share of the batch's rows
    rows: int  # the batch's rows in the bin
    label: str | None = None  # a LEVELS term's bin: a level, `other` or `unseen` (low and high None)


@dataclass(frozen=True)
class DriftRow:
    """The drift of one term, or of the score (name 'linear_predictor')."""

    name: str
    psi: float
    reading: str
    bins: tuple[Bin, ...]  # the training bins; the NULL bin is apart, in the null shares
    null_share: float
    training_null_share: float
    below_min_share: float  # batch rows below the training minimum
    above_max_share: float  # batch rows above the training maximum
    mean: float | None  # of the batch's non-NULL values (None: all NULL, or a LEVELS term)
    training_mean: float | None  # None for a LEVELS term
    shift: float | None  # terms: the batch's mean contribution (0 in training); score: mean minus training mean
    rank: int | None = None  # terms: 1 for the term that moved the scores most (largest |shift|)
    unseen: tuple[tuple[str, int], ...] = ()  # a LEVELS term: the batch's levels never seen in training, with rows

    def as_dict(self) -> dict:
        return {
            "name": self.name, "psi": self.psi, "reading": self.reading, "rank": self.rank, "shift": self.shift,
            "mean": self.mean, "training_mean": self.training_mean,
            "null_share": self.null_share, "training_null_share": self.training_null_share,
            "below_min_share": self.below_min_share, "above_max_share": self.above_max_share,
            "bins": [{key: value for key, value in vars(item).items() if key != "label" or value is not None}
                     for item in self.bins],
            # A LEVELS term's bins carry a label; its batch's levels never seen in training are listed.
            **({"unseen": [{"level": level, "rows": rows} for level, rows in self.unseen]}
               if any(item.label for item in self.bins) else {}),
        }


@dataclass(frozen=True)
class DriftReport:
    model: str
    table: str
    rows: int
    score: DriftRow
    terms: tuple[DriftRow, ...]  # ranked by |shift|, largest first (ties in model order)
    stale: tuple[str, ...] = ()  # why the model is stale, when drift was allowed anyway

    def exceeding(self, limit: float) -> tuple[str, ...]:
        """Names (terms, then 'linear_predictor' for the score) whose PSI is above `limit`."""
        return tuple(row.name for row in (*self.terms, self.score) if row.psi > limit)

    def as_dict(self) -> dict:
        return {
            "model": self.model, "table": self.table, "rows": self.rows, "stale": list(self.stale),
            "rules": {
                "psi": "sum over bins of (actual - expected) * ln(actual / expected); NULL is a bin of its own",
                "empty_share": EMPTY_SHARE,
                "readings": {STABLE: f"psi < {MODERATE_FROM}", MODERATE: f"{MODERATE_FROM} <= psi <= {MAJOR_ABOVE}",
                             MAJOR: f"psi > {MAJOR_ABOVE}"},
            },
            "score": self.score.as_dict(),
            "terms": [row.as_dict() for row in self.terms],
        }


def monitored(fitted: FittedModel) -> tuple[Monitored, ...]:
    """Every term in model order, then the linear predictor; refuses a fitted file without profiles.

    A learned term is monitored as one term: CAPPED as its one column, BINS and SPLINE by their
    argument over its training deciles, LEVELS by its levels (featpipe.fitted.learned.learned_monitored).
    """
    items = [Monitored(term.name, term.profile, term.estimate) if term.learned is None
             else learned_monitored(term, fitted.rows.get("train")) for term in fitted.model_terms]
    items.append(Monitored(LINEAR_PREDICTOR, fitted.linear_predictor))
    for item in items:
        if item.profile is None and not item.categories:
            raise FeatpipeError(f"{fitted_source(fitted)}: {item.name} has no training profile; run `featpipe fit` again")
    return tuple(items)


def drift_header(fitted: FittedModel, fitted_hash: str) -> str:
    """SQL comment lines stating what the drift query returns and the rules it applies."""
    lines = [
        f"featpipe drift query for model '{fitted.model}', input '{fitted.input}'",
        f"fitted file {fitted_source(fitted)}, hash {fitted_hash}; model fingerprint {fitted.fingerprint}",
        f"One row: {ROWS}; per term and for {LINEAR_PREDICTOR} the rows per training bin ({bin_column('<name>', '<i>')}),",
        (f"NULLs ({bin_column('<name>', NULL_BIN)}, a bin of its own), values outside the training range "
         f"({below_column('')}, {above_column('')}),"),
        f"the mean of the non-NULL values ({mean_column('')}), per term the mean of coefficient * (value - training mean) over",
        (f"its non-NULL values ({mean_contribution_column('')}, 0 in training) and the population stability index "
         f"({psi_column('')})."),
        "Bins: bin 1 is value <= first edge, bin i is previous edge < value <= edge i, the last is above the last edge;",
        "expected shares are the training rows' (NULLs included), written below as literals.",
        *(["A LEVELS term's bins are its levels (the reference and each level with a column), then `other` (the",
           "pooled levels) when it has pooled levels, then `unseen` (levels no training row had; expected share 0)."]
          if any(term.learned and term.learned["function"] == "LEVELS" for term in fitted.model_terms) else []),
        f"PSI = SUM over bins of (actual - expected) * LN(actual / expected); a share below {EMPTY_SHARE:g} counts as {EMPTY_SHARE:g}.",
        (f"Reading (common practice in credit scoring): below {MODERATE_FROM} stable, {MODERATE_FROM} to {MAJOR_ABOVE} "
         f"a moderate shift, above {MAJOR_ABOVE} a major shift."),
    ]
    return sql_comment(lines)


def read_drift(fitted: FittedModel, table: str, names: list[str], row: tuple, unseen: tuple = ()) -> DriftReport:
    """The report from the drift query's one row (`names`: its column names, see output_names) and the
    rows of the unseen-levels query (term, level, rows)."""
    values = dict(zip(names, row, strict=True))
    rows = int(values[ROWS])
    if rows == 0:
        raise FeatpipeError(f"table '{table}' has no rows; there is no batch to compare with the training rows")
    items = monitored(fitted)
    terms = [replace(_row(item, values, rows), unseen=tuple((str(level), int(count)) for term, level, count in unseen
                                                            if term == item.name))
             for item in items[:-1]]
    ranked = sorted(range(len(terms)), key=lambda index: -abs(terms[index].shift or 0.0))
    for rank, index in enumerate(ranked, start=1):
        terms[index] = replace(terms[index], rank=rank)
    return DriftReport(fitted.model, table, rows, _row(items[-1], values, rows), tuple(terms[index] for index in ranked))


def _row(item: Monitored, values: dict, rows: int) -> DriftRow:
    profile = item.profile
    expected = item.expected()
    edges = () if item.categories else profile.edges
    lows, highs = (None, *edges), (*edges, None)
    labels = (*(category.label for category in item.categories), UNSEEN) if item.categories else (None,) * item.bins
    bins = tuple(
        Bin(lows[index - 1] if edges else None, highs[index - 1] if edges else None, expected[index - 1],
            int(values[bin_column(item.name, index)]) / rows, int(values[bin_column(item.name, index)]), labels[index - 1])
        for index in range(1, item.bins + 1)
    )
    mean = _optional(values[mean_column(item.name)])
    if item.estimate is not None or item.parts:
        shift = _optional(values[mean_contribution_column(item.name)])
    else:
        shift = None if mean is None else mean - profile.mean
    psi = float(values[psi_column(item.name)])
    return DriftRow(
        name=item.name, psi=psi, reading=reading(psi), bins=bins,
        null_share=int(values[bin_column(item.name, NULL_BIN)]) / rows, training_null_share=expected[-1],
        below_min_share=int(values[below_column(item.name)]) / rows,
        above_max_share=int(values[above_column(item.name)]) / rows,
        mean=mean, training_mean=None if profile is None else profile.mean, shift=shift,
    )


def _optional(value) -> float | None:
    return None if value is None else float(value)


def drift(
    project: Project, model: str, table: str, *, allow_stale: bool = False, progress: Progress | None = None,
) -> DriftReport:
    """Compare `table` with the training rows of fitted/MODEL.yaml, in one query inside the project's engine.

    Refuses, before running anything: a model whose definitions changed since its fit (unless
    `allow_stale`) and a table that does not meet the input's column contract (the columns the model reads).
    """
    fitted = load_fitted(project, model)
    stale = refuse_if_stale(project, fitted, allow_stale=allow_stale)
    contract = scoring_contract(project.inputs[fitted.input], fitted)
    items = monitored(fitted)
    query = drift_query(scoring_model(fitted), items, table=table)
    levels = unseen_levels_query(scoring_model(fitted), items, table=table)
    with connect(project) as engine:
        check_contract(contract, table, engine.describe(table), engine.name)
        if progress:
            progress(f"comparing {table} with the training rows of {model} in {engine.name}")
        (row,) = engine.fetch(query)
        unseen = tuple(engine.fetch(levels)) if levels is not None else ()
    report = read_drift(fitted, table, output_names(query), row, unseen)
    return replace(report, stale=stale)


def render_drift_sql(project: Project, model: str, table: str | None = None, dialect: str = "duckdb") -> str:
    """The drift SQL of fitted/MODEL.yaml for `dialect` (default table: the input's name), with its header."""
    check_dialect(dialect)
    fitted = load_fitted(project, model)
    query = drift_query(scoring_model(fitted), monitored(fitted), table=table)
    return drift_header(fitted, file_hash(project.fitted_path(model))) + render(query, dialect) + ";\n"
