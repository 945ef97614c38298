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
    unseen_column,
)
from ..sqlgen.common import check_dialect, render
from ..sqlgen.drift import (
    EMPTY_SHARE,
    Monitored,
    drift_query,
    output_names,
    unseen_levels_query,
)
from ..sqlgen.inputs import batch_health_query
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


# Beyond PSI, whose training deciles cannot see values piling up past the training range nor a shift
# inside one bin (rules of thumb): rows outside the training range, 1% or more moderate and 5% or more
# major; the score's mean shift in training standard deviations of the linear predictor (a standardised
# mean difference), 0.1 or more moderate and 0.25 or more major.
OUTSIDE_MODERATE, OUTSIDE_MAJOR = 0.01, 0.05
SHIFT_MODERATE, SHIFT_MAJOR = 0.1, 0.25
SEVERITY = (STABLE, MODERATE, MAJOR)
# The figures `--fail-above` can gate on, as NAME=LIMIT: what each compares.
LIMITS = {
    "psi": "the PSI of a term or of the score",
    "shift": "the absolute mean shift of the score or of a term's contribution, on the linear predictor's scale",
    "outside": "the share of a term's or the score's values outside the training range",
    "null_rise": "the rise of an input column's NULL rate over its training NULL rate",
    "unseen": "the share of a text input column's values at a level never seen in training",
}


def parse_limits(texts: list[str]) -> dict[str, float]:
    """`--fail-above` values: NAME=LIMIT for a figure of LIMITS, or a bare LIMIT for the PSI."""
    limits = {}
    for text in texts:
        name, _, value = text.rpartition("=")
        name = name.strip() or "psi"
        try:
            limit = float(value)
        except ValueError:
            limit = None
        if name not in LIMITS or limit is None:
            raise FeatpipeError(f"--fail-above {text}: give LIMIT (for the PSI) or NAME=LIMIT with NAME one of "
                                f"{', '.join(LIMITS)}, e.g. --fail-above unseen=0.01")
        limits[name] = limit
    return limits


def reading(psi: float) -> str:
    """below 0.1 stable, 0.1 to 0.25 a moderate shift, above 0.25 a major shift (common practice)."""
    if psi < MODERATE_FROM:
        return STABLE
    return MODERATE if psi <= MAJOR_ABOVE else MAJOR


def _graded(value: float, moderate: float, major: float) -> str:
    return STABLE if value < moderate else MODERATE if value < major else MAJOR


def combined_reading(psi: float, outside: float, standardised_shift: float | None = None) -> tuple[str, tuple[str, ...]]:
    """The worst of the PSI's reading, the share outside the training range and (the score) its
    standardised shift, with what made it worse than stable."""
    figures = [(reading(psi), f"PSI {psi:.3f}"),
               (_graded(outside, OUTSIDE_MODERATE, OUTSIDE_MAJOR), f"{outside:.1%} of rows outside the training range")]
    if standardised_shift is not None:
        figures.append((_graded(abs(standardised_shift), SHIFT_MODERATE, SHIFT_MAJOR),
                        f"mean moved {standardised_shift:+.2f} training sd"))
    worst = max((found for found, _ in figures), key=SEVERITY.index)
    return worst, tuple(why for found, why in figures if found != STABLE)


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
    reasons: tuple[str, ...] = ()  # what made the reading worse than stable

    @property
    def outside_share(self) -> float:
        """Rows below the training minimum or above the training maximum."""
        return self.below_min_share + self.above_max_share

    def as_dict(self) -> dict:
        return {
            "name": self.name, "psi": self.psi, "reading": self.reading, "reasons": list(self.reasons),
            "rank": self.rank, "shift": self.shift, "outside_share": self.outside_share,
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
class InputHealth:
    """One input column a term reads: its NULL rate and (text) the share at a level unseen in training."""

    name: str
    null_share: float
    training_null_share: float
    unseen_share: float | None  # None: not a text column, or too many training levels to keep

    @property
    def null_rise(self) -> float:
        return self.null_share - self.training_null_share


@dataclass(frozen=True)
class DriftReport:
    model: str
    table: str
    rows: int
    score: DriftRow
    terms: tuple[DriftRow, ...]  # ranked by |shift|, largest first (ties in model order)
    stale: tuple[str, ...] = ()  # why the model is stale, when drift was allowed anyway
    inputs: tuple[InputHealth, ...] | None = None  # None: the fitted file has no input profiles (fitted before them)

    def exceeding(self, limit: float) -> tuple[str, ...]:
        """Names (terms, then 'linear_predictor' for the score) whose PSI is above `limit`."""
        return tuple(row.name for row in (*self.terms, self.score) if row.psi > limit)

    def over_limits(self, limits: dict[str, float]) -> tuple[str, ...]:
        """One line per figure of `limits` (names of LIMITS) with a value above its limit, naming each
        term, score or input column over it: 'PSI above 0.25: a, b', 'unseen above 0.01: sector (2.3%)'."""
        rows = [*self.terms, self.score]
        values = {
            "psi": [(row.name, row.psi) for row in rows],
            "shift": [(row.name, abs(row.shift)) for row in rows if row.shift is not None],
            "outside": [(row.name, row.outside_share) for row in rows],
            "null_rise": [(item.name, item.null_rise) for item in self.inputs or ()],
            "unseen": [(item.name, item.unseen_share) for item in self.inputs or () if item.unseen_share is not None],
        }
        lines = []
        for figure, limit in limits.items():
            over = [(name, value) for name, value in values[figure] if value > limit]
            if figure == "psi" and over:
                lines.append(f"PSI above {limit:g}: {', '.join(name for name, _ in over)}")
            elif over:
                lines.append(f"{figure} above {limit:g}: {', '.join(f'{name} ({value:.4g})' for name, value in over)}")
        return tuple(lines)

    def as_dict(self) -> dict:
        return {
            "model": self.model, "table": self.table, "rows": self.rows, "stale": list(self.stale),
            "rules": {
                "psi": "sum over bins of (actual - expected) * ln(actual / expected); NULL is a bin of its own",
                "empty_share": EMPTY_SHARE,
                "readings": {STABLE: f"psi < {MODERATE_FROM}", MODERATE: f"{MODERATE_FROM} <= psi <= {MAJOR_ABOVE}",
                             MAJOR: f"psi > {MAJOR_ABOVE}"},
                "also": (f"a reading is at least moderate from {OUTSIDE_MODERATE:g} and major from {OUTSIDE_MAJOR:g} of rows "
                         f"outside the training range; the score's also from a mean shift of {SHIFT_MODERATE:g} and "
                         f"{SHIFT_MAJOR:g} training sd of the linear predictor (rules of thumb)"),
                "fail_above": LIMITS,
            },
            "score": self.score.as_dict(),
            "terms": [row.as_dict() for row in self.terms],
            "inputs": None if self.inputs is None else [
                {**vars(item), "null_rise": item.null_rise} for item in self.inputs],
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
    score = _row(items[-1], values, rows)
    spread = items[-1].profile.sd
    standardised = score.shift / spread if score.shift is not None and spread else None
    score_reading, reasons = combined_reading(score.psi, score.outside_share, standardised)
    score = replace(score, reading=score_reading, reasons=reasons)
    return DriftReport(fitted.model, table, rows, score, tuple(terms[index] for index in ranked))


def read_inputs(fitted: FittedModel, names: list[str], row: tuple) -> tuple[InputHealth, ...]:
    """The input health from the batch health query's one row, against the fitted file's input profiles."""
    values = dict(zip(names, row, strict=True))
    rows, training = int(values[ROWS]), fitted.input_profiles
    health = []
    for name, profile in training["columns"].items():
        unseen = values.get(unseen_column(name))
        health.append(InputHealth(
            name=name, null_share=int(values[bin_column(name, NULL_BIN)]) / rows if rows else 0.0,
            training_null_share=profile["nulls"] / training["rows"] if training["rows"] else 0.0,
            unseen_share=None if unseen is None or not rows else int(unseen) / rows,
        ))
    return tuple(health)


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
    below, above = int(values[below_column(item.name)]) / rows, int(values[above_column(item.name)]) / rows
    found, reasons = combined_reading(psi, below + above)
    return DriftRow(
        name=item.name, psi=psi, reading=found, reasons=reasons, bins=bins,
        null_share=int(values[bin_column(item.name, NULL_BIN)]) / rows, training_null_share=expected[-1],
        below_min_share=below, above_max_share=above,
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
        inputs = None
        if fitted.input_profiles:
            health = batch_health_query(table, list(fitted.input_profiles["columns"]), {
                name: profile["levels"] for name, profile in fitted.input_profiles["columns"].items()
                if profile.get("levels") is not None})
            inputs = read_inputs(fitted, output_names(health), engine.fetch(health)[0])
    report = read_drift(fitted, table, output_names(query), row, unseen)
    return replace(report, stale=stale, inputs=inputs)


def render_drift_sql(project: Project, model: str, table: str | None = None, dialect: str = "duckdb") -> str:
    """The drift SQL of fitted/MODEL.yaml for `dialect` (default table: the input's name), with its header."""
    check_dialect(dialect)
    fitted = load_fitted(project, model)
    query = drift_query(scoring_model(fitted), monitored(fitted), table=table)
    return drift_header(fitted, file_hash(project.fitted_path(model))) + render(query, dialect) + ";\n"
