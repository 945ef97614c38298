"""`featpipe suggest`: candidate terms for a fitted model, ranked by score tests computed in the engine.

Starting from the current fit (its coefficients in fitted/MODEL.yaml, read as scoring reads them, so a
learned term is its design columns from the constants there), candidates are generated from
the input's declared columns (compiler.candidates), compiled like any term file, and tested with
Rao's score test (glm.score_test) from SUM aggregates over the training rows: a scan for the columns'
figures, one for the frequent text levels (when the input has text columns), and one per chunk of
candidates for the sums (one chunk unless the engine limits the select list). Only sums leave the
engine, whatever the number of rows.

Candidates found by searching are hypotheses: the Holm adjustment covers the candidates tested in
this run, not every search a person makes; a refit and the holdout decide.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

from sqlglot import exp

from ..compiler import CompiledModel, CompiledProject, Term, column_term, compile_project
from ..compiler.candidates import (
    Candidate,
    ColumnSummary,
    ModelTermInfo,
    generate_candidates,
    numeric_columns,
    term_file_text,
    text_columns,
)
from ..engines.base import Engine
from ..errors import FeatpipeError
from ..fitted import FittedModel
from ..fitted.scoring import scoring_model
from ..project import InputSpec, TermFile
from ..sqlgen.design import term_value
from ..sqlgen.profile import DECILES, decile_rank, read_ranks
from ..sqlgen.suggest import (
    candidate_means_query,
    candidate_sums_width,
    column_ranks_query,
    column_summary_query,
    level_counts_query,
    model_sums_width,
    read_column_summaries,
    read_levels,
    score_sums_query,
)
from .order_statistics import PERCENTILE, engine_route

# Values one query may return, by engine: PostgreSQL refuses more than 1,664 columns in a select list;
# Spark compiles a very wide aggregate slowly, so it gets narrower chunks.
MAX_SUMS = {"postgres": 1600, "spark": 1000}
DEFAULT_MAX_SUMS = 5000
SAMPLE_ROWS = 10_000  # training rows whose candidate means shift the sums
CAUTION = ("Candidates found by searching are hypotheses, not findings: a refit and the holdout decide. The Holm "
           "adjustment covers the candidates tested in this run, not every search a person makes.")
DROP_REASONS = ("mostly NULL", "constant", "collinear")


@dataclass(frozen=True)
class Suggestion:
    """One tested candidate and its score test at the current fit."""

    rank: int
    name: str
    kind: str
    description: str
    sql: str
    statistic: float
    p_value: float
    p_holm: float  # Holm-adjusted over every candidate tested
    estimate: float  # one-step estimate of its coefficient
    deviance_gain: float  # approximate drop of the deviance
    null_share: float  # training rows where it is NULL (they enter the test at its sample mean)

    def line(self, tested: int) -> str:
        """The plain-language reading of the test."""
        return (f"{self.description}: adding it would reduce the deviance by about {_figure(self.deviance_gain)} "
                f"(score test, {_p_text(self.p_holm)} after Holm adjustment over {tested} candidates)")


@dataclass(frozen=True)
class SuggestReport:
    model: str
    input: str
    family: str
    training_rows: int
    generated: int
    considered: int  # after the --max-candidates cap
    dropped: dict[str, int]  # per reason
    suggestions: tuple[Suggestion, ...]  # every tested candidate, ranked by statistic
    scans: int  # full reads of the training rows
    top: int

    @property
    def tested(self) -> int:
        return len(self.suggestions)

    @property
    def shown(self) -> tuple[Suggestion, ...]:
        return self.suggestions[: self.top]

    def as_dict(self) -> dict:
        return {
            "model": self.model, "family": self.family, "training_rows": self.training_rows,
            "generated": self.generated, "considered": self.considered, "dropped": dict(self.dropped),
            "tested": self.tested, "scans": self.scans, "caution": CAUTION,
            "suggestions": [{**dataclasses.asdict(s), "reading": s.line(self.tested)} for s in self.shown],
        }


def suggest(
    engine: Engine, compiled: CompiledProject, model: CompiledModel, fitted: FittedModel,
    *, top: int = 10, max_candidates: int = 500, min_rows: int = 30, sample_rows: int = SAMPLE_ROWS,
) -> SuggestReport:
    """Generate, compile and test the candidates for `model` at the fit in `fitted` (current, checked by the caller)."""
    # numpy and scipy load when a model is tested, not with the API.
    from ..glm.score_test import (
        dispersion,
        drop_reason,
        holm,
        read_candidate_sums,
        read_model_sums,
        score_test,
    )

    spec, project = model.spec, compiled.project
    source = project.inputs[spec.input]
    if spec.family not in ("binomial", "poisson", "gaussian"):
        raise FeatpipeError(f"{spec.display}: suggest's score tests are written for the binomial, poisson and gaussian "
                            f"families, not {spec.family}; try candidate terms by adding them to the spec and fitting")
    if spec.penalty.active:
        raise FeatpipeError(f"{spec.display}: the model is penalized; score tests need a plain maximum-likelihood fit "
                            "(set penalty l2 and l1 to 0, fit, then suggest)")
    fit = scoring_model(fitted)  # the design columns and coefficients of the fit, a learned term's from its constants
    offset_columns = {node.name for node in model.offset.find_all(exp.Column)} if model.offset is not None else set()
    numeric = numeric_columns(spec, source, offset_columns)
    texts = text_columns(spec, source, offset_columns)
    scans = 0
    summaries: list[ColumnSummary] = []
    rows = 0
    if numeric:
        exact = engine_route(engine.dialect) == PERCENTILE  # an exact percentile aggregate that spills
        rows, figures = read_column_summaries(engine.fetch(column_summary_query(model, source, numeric, deciles=exact))[0], numeric,
                                              deciles=exact)
        scans += 1
        if not exact:
            figures = _with_deciles(engine, model, source, numeric, figures)
            scans += 1
        for name in numeric:
            count, total, low, high, deciles = figures[name]
            summaries.append(ColumnSummary(name, rows, count, total / count if count else None, low, high, deciles))
    levels = {}
    if texts:
        levels = read_levels(engine.fetch(level_counts_query(model, source, texts, min_rows)), texts)
        scans += 1

    taken = {name.lower() for name in compiled.terms} | {name.lower() for name in source.columns}
    model_terms = [ModelTermInfo(term.name, term.kind == "boolean", term.learned is not None) for term in model.terms]
    generated = generate_candidates(model_terms, summaries, levels, taken)
    considered = generated[:max_candidates]
    terms = _compile_candidates(compiled, spec.input, considered)
    values = {f"_c{index}": term_value(terms[c.name], source) for index, c in enumerate(considered)}
    aliases = list(values)

    per_query = MAX_SUMS.get(engine.name, DEFAULT_MAX_SUMS)
    shifts: dict[str, float] = {}
    for chunk in _chunks(aliases, per_query):
        means = engine.fetch(candidate_means_query(model, source, {name: values[name] for name in chunk}, sample_rows))[0]
        shifts.update({name: 0.0 if mean is None else float(mean) for name, mean in zip(chunk, means, strict=True)})

    size = len(fit.terms)
    model_width, candidate_width = model_sums_width(size), candidate_sums_width(size)
    chunk_size = max(1, (per_query - model_width) // candidate_width)
    model_sums, candidate_sums = None, []
    chunks = _chunks(aliases, chunk_size) or [[]]
    for index, chunk in enumerate(chunks):
        query = score_sums_query(model, source, fit, {name: values[name] for name in chunk}, shifts, with_model=index == 0)
        row = engine.fetch(query)[0]
        scans += 1
        if index == 0:
            model_sums, row = read_model_sums(row[:model_width], size), row[model_width:]
        candidate_sums += [read_candidate_sums(row[i * candidate_width:(i + 1) * candidate_width]) for i in range(len(chunk))]
    if model_sums is None or model_sums.rows == 0:
        raise FeatpipeError(f"{spec.display}: no training rows in input '{spec.input}'; compute and fit the model first")

    phi = dispersion(spec.family, model_sums)
    dropped = {reason: 0 for reason in DROP_REASONS}
    tested = []
    for candidate, sums in zip(considered, candidate_sums, strict=True):
        null_share = 1.0 - sums.count / model_sums.rows
        reason = "mostly NULL" if null_share > spec.max_dropped else drop_reason(model_sums, sums)
        if reason:
            dropped[reason] += 1
            continue
        tested.append((candidate, null_share, score_test(model_sums, sums, phi)))
    adjusted = holm([test.p_value for _, _, test in tested]) if tested else []
    ranked = sorted(zip(tested, adjusted), key=lambda pair: (-pair[0][2].statistic, pair[0][0].name))
    suggestions = tuple(
        Suggestion(rank=rank, name=candidate.name, kind=candidate.kind, description=candidate.description, sql=candidate.sql,
                   statistic=test.statistic, p_value=test.p_value, p_holm=float(p_holm), estimate=test.estimate,
                   deviance_gain=test.deviance_gain, null_share=null_share)
        for rank, ((candidate, null_share, test), p_holm) in enumerate(ranked, start=1)
    )
    return SuggestReport(model=spec.name, input=spec.input, family=spec.family, training_rows=model_sums.rows,
                         generated=len(generated), considered=len(considered),
                         dropped={reason: count for reason, count in dropped.items() if count},
                         suggestions=suggestions, scans=scans, top=top)


def _with_deciles(engine: Engine, model: CompiledModel, source: InputSpec, columns: list[str], figures: dict) -> dict:
    """`figures` (count, sum, min, max, deciles) with the deciles read by the window route: the distinct
    values at ranks ceil(k n / 10), what PERCENTILE_DISC(k / 10) gives on the other engines."""
    ranks = {name: tuple(sorted({decile_rank(k, figure[0]) for k in DECILES})) for name, figure in figures.items() if figure[0]}
    found = read_ranks(ranks, engine.fetch(column_ranks_query(model, source, columns, ranks))) if ranks else {}
    return {name: (*figure[:4], tuple(sorted(set(found.get(name, {}).values())))) for name, figure in figures.items()}


def _chunks(items: list[str], size: int) -> list[list[str]]:
    return [items[start:start + size] for start in range(0, len(items), size)]


def _compile_candidates(compiled: CompiledProject, input_name: str, candidates: list[Candidate]) -> dict[str, Term]:
    """Each candidate as a checked term: written as a term file and compiled with the project, so what is
    tested is what `--into` writes; a column candidate is the column itself."""
    project = compiled.project
    terms = {c.name: column_term(project, input_name, c.name) for c in candidates if c.kind == "column"}
    written = [([], c) for c in candidates if c.kind != "column"]
    if written:
        display = "(candidates of featpipe suggest)"
        text = term_file_text(input_name, [], written)
        extended = dataclasses.replace(project, term_files=(*project.term_files, TermFile(project.root / display, display, text)))
        try:
            found = compile_project(extended).terms
        except FeatpipeError as error:  # a bug here, never the user's files (they passed check)
            raise AssertionError(f"candidate terms do not compile: {error}") from None
        terms.update({c.name: found[c.name] for _, c in written})
    return terms


def proposed_file_text(report: SuggestReport, spec_display: str) -> str:
    """The top suggestions as a term file: a comment with the test above each term; input columns, which a
    spec lists directly, are named in the header."""
    tested = report.tested
    header = [f"Terms proposed by `featpipe suggest {report.model}`: score tests at the current fit over {report.training_rows} "
              f"training rows, {tested} candidates tested.",
              "Add the ones you accept to the terms of " + spec_display + ", refit, and let the holdout decide.",
              CAUTION]
    columns = [s for s in report.shown if s.kind == "column"]
    for s in columns:
        header.append(f"Input column {s.name} (list it in the spec's terms directly): {_test_text(s, tested)}")
    terms = [([s.description + ".", _test_text(s, tested)], Candidate(s.name, s.kind, s.sql, s.description))
             for s in report.shown if s.kind != "column"]
    if not terms:
        raise FeatpipeError("the top suggestions are all input columns, which a spec lists directly: "
                            f"{', '.join(s.name for s in columns)}; there is no term to write (run without --into)")
    return term_file_text(report.input, header, terms)


def _test_text(s: Suggestion, tested: int) -> str:
    return (f"score statistic {_figure(s.statistic)} on 1 df, {_p_text(s.p_holm)} after Holm adjustment over {tested} "
            f"candidates; one-step estimate {s.estimate:.4g}; deviance about {_figure(s.deviance_gain)} lower"
            + (f"; NULL in {s.null_share:.1%} of training rows" if s.null_share > 0 else ""))


def _figure(value: float) -> str:
    """A deviance or statistic as people say it: 310, 12.4, 0.031."""
    if not math.isfinite(value):
        return str(value)
    return f"{value:,.0f}" if abs(value) >= 100 else f"{value:.3g}"


def _p_text(p: float) -> str:
    return "p < 1e-12" if p < 1e-12 else f"p = {p:.2g}"
