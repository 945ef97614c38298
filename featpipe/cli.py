"""The featpipe command line: parse arguments, call one API function, print.

Exit status: 0 ok, 1 a problem the user can fix (clear message, no traceback), 2 an internal error.
"""

from __future__ import annotations

import json
import os
import sys
import traceback
from dataclasses import asdict
from enum import Enum
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Optional

import typer
from rich.console import Console

from .errors import Diagnostic, FeatpipeError
from .sqlgen.dialects import DIALECTS

if TYPE_CHECKING:
    from rich.table import Table

    from .api import FitOutcome
    from .fitted import FittedModel

app = typer.Typer(
    help="Engineered model terms as reviewed SQL: check, compute, fit, explain and score in the warehouse.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)
out = Console(highlight=False, soft_wrap=True, width=None if sys.stdout.isatty() else 160)
err = Console(stderr=True, highlight=False, soft_wrap=True)

ProjectOption = Annotated[
    Optional[Path],
    typer.Option("--project", "-p", help="Project folder (default: the nearest folder upward holding featpipe.yaml)."),
]
JsonOption = Annotated[bool, typer.Option("--json", help="Print machine-readable JSON instead of text.")]


class CheckFormat(str, Enum):
    text = "text"
    github = "github"


def _print_json(value) -> None:
    print(json.dumps(value, indent=2, default=str))


def _progress(message: str) -> None:
    err.print(f"[dim]… {message}[/dim]")


@app.command()
def new(path: Annotated[Path, typer.Argument(help="Folder to create; must not exist or be empty.")]) -> None:
    """Scaffold a project with one input, one term file and one spec."""
    from .project.scaffold import scaffold

    written = scaffold(path)
    out.print(f"created project in {path}:")
    for file in written:
        out.print(f"  {file}")
    out.print(f"next: featpipe check -p {path} && featpipe compute -p {path}")


@app.command()
def check(
    project: ProjectOption = None,
    json_output: JsonOption = False,
    format: Annotated[CheckFormat, typer.Option("--format", help="text, or github for workflow annotations.")] = CheckFormat.text,
) -> None:
    """All static validation of term files and model specs; errors as file:line:col: message."""
    from . import api
    from .project import load_project

    loaded = None
    try:
        loaded = load_project(project, partial=True)
        report = api.check_report(loaded)
    except FeatpipeError as error:
        if not error.diagnostics:
            raise
        _print_diagnostics(error.diagnostics, json_output, format, root=loaded.root if loaded else project)
        raise typer.Exit(1)
    if json_output:
        _print_json(report.as_dict())
        return
    for warning in report.warnings:
        _print_diagnostic(warning, format, report.root)
    out.print(f"ok: {len(report.terms)} terms, {len(report.models)} models checked")
    for stale in report.stale:
        out.print(f"stale fit: {stale}")


def _print_diagnostics(diagnostics: list[Diagnostic], json_output: bool, format: CheckFormat, root) -> None:
    if json_output:
        _print_json({"ok": False, "diagnostics": [d.as_dict() for d in diagnostics]})
        return
    for diagnostic in diagnostics:
        _print_diagnostic(diagnostic, format, root)
    errors = sum(d.severity == "error" for d in diagnostics)
    err.print(f"{errors} error{'s' if errors != 1 else ''}; nothing was run")


def _print_diagnostic(diagnostic: Diagnostic, format: CheckFormat, root) -> None:
    if format == CheckFormat.github:
        path = _relative_to_cwd(Path(root or ".") / diagnostic.file)
        level = "error" if diagnostic.severity == "error" else "warning"
        print(f"::{level} file={path},line={diagnostic.line},col={diagnostic.col}::{diagnostic.message}")
    else:
        print(str(diagnostic), file=sys.stderr if diagnostic.severity == "error" else sys.stdout)


def _relative_to_cwd(path: Path) -> str:
    try:
        return path.resolve().relative_to(Path.cwd().resolve()).as_posix()
    except ValueError:
        return path.as_posix()


@app.command()
def compute(
    models: Annotated[Optional[list[str]], typer.Argument(help="Models whose design tables to compute (default: all).")] = None,
    project: ProjectOption = None,
    json_output: JsonOption = False,
) -> None:
    """Compute each model's design table in the engine, loading local data files first."""
    from . import api
    from .project import load_project

    built = api.compute(load_project(project), models, progress=None if json_output else _progress)
    if json_output:
        _print_json([vars(table) for table in built])
        return
    for table in built:
        out.print(f"{table.table}: {table.rows} rows")


class Part(str, Enum):
    terms = "terms"
    design = "design"
    score = "score"
    drift = "drift"


@app.command()
def sql(
    model: Annotated[str, typer.Argument(help="Model name (specs/NAME.yaml; for --part score or drift, fitted/NAME.yaml).")],
    project: ProjectOption = None,
    dialect: Annotated[str, typer.Option("--dialect", "-d", help=f"One of {', '.join(DIALECTS)}.")] = "duckdb",
    part: Annotated[Part, typer.Option("--part", help="Which query to print.")] = Part.design,
    table: Annotated[Optional[str], typer.Option("--table", help="Read this table instead of the input's name.")] = None,
    reasons: Annotated[int, typer.Option("--reasons", min=0, help="--part score: add reason_1..reason_K, the K terms pushing the prediction up most.")] = 0,
    as_view: Annotated[Optional[str], typer.Option("--as-view", help="--part score: wrap the query as CREATE VIEW NAME.")] = None,
    into: Annotated[Optional[str], typer.Option("--into", help="--part score: wrap the query as CREATE TABLE NAME AS.")] = None,
) -> None:
    """Print the generated SQL of a model, rendered for a dialect."""
    from . import api
    from .project import load_project

    loaded = load_project(project)
    if part != Part.score and (reasons or as_view or into):
        raise FeatpipeError("--reasons, --as-view and --into apply to --part score only")
    if part == Part.score:
        from .fitted.scoring import render_score_sql

        text = render_score_sql(loaded, model, dialect=dialect, table=table, reasons=reasons, as_view=as_view, into=into)
    elif part == Part.drift:
        from .fitted.drift import render_drift_sql

        text = render_drift_sql(loaded, model, table, dialect)
    else:
        text = api.render_sql(loaded, model, part.value, dialect, table)
    print(text, end="")


@app.command()
def score(
    model: Annotated[str, typer.Argument(help="Model name (fitted/NAME.yaml).")],
    table: Annotated[str, typer.Option("--table", "-t", help="Table to score, in the project's engine.")],
    into: Annotated[str, typer.Option("--into", "-o", help="Table to write the scores to (replaced atomically).")],
    project: ProjectOption = None,
    reasons: Annotated[int, typer.Option("--reasons", min=0, help="Add reason_1..reason_K: the K terms pushing the prediction up most.")] = 0,
    allow_stale: Annotated[bool, typer.Option("--allow-stale", help="Score even if terms changed since the fit (with the fitted definitions).")] = False,
    json_output: JsonOption = False,
) -> None:
    """Batch-score a table inside the engine with the fitted model's scoring SQL."""
    from .fitted.scoring import score as score_table
    from .project import load_project

    result = score_table(load_project(project), model, table=table, into=into, reasons=reasons,
                         allow_stale=allow_stale, progress=None if json_output else _progress)
    if json_output:
        _print_json(result.as_dict())
        return
    for reason in result.stale:
        err.print(f"warning: scored with a stale fit ({reason})", markup=False)
    out.print(f"{result.into}: {result.rows} rows scored from {result.table}", markup=False)
    for status, rows in result.status.items():
        out.print(f"  {rows:>10}  {status}", markup=False)


def _number(value, digits: int = 4) -> str:
    return "" if value is None else f"{value:.{digits}g}"


def coefficient_table(fitted: FittedModel) -> Table:
    """The coefficient table practitioners compare with R's glm summary, plus effects per step."""
    from rich.table import Table

    statistic = fitted.fit.get("statistic", "z")
    table = Table(title=f"{fitted.model}: {fitted.family} ({fitted.link} link), {fitted.rows['train']} training rows")
    for heading in ("term", "estimate", "std error", statistic, "p", "95% interval", "effect per step", "VIF"):
        table.add_column(heading, justify="left" if heading == "term" else "right")
    for term in fitted.terms:
        interval = "" if term.ci_low is None else f"{_number(term.ci_low)} to {_number(term.ci_high)}"
        effect = ""
        if term.effect is not None:
            effect = f"{term.effect.kind} {_number(term.effect.value, 3)} per {term.effect.step:g}"
        table.add_row(term.name, _number(term.estimate), _number(term.std_error), _number(term.statistic, 3),
                      _number(term.p_value, 2), interval, effect, _number(term.vif, 3))
        if term.learned and len(term.learned["columns"]) > 1:  # a learned term's columns, under it
            for item in term.learned["columns"]:
                low = "" if item["ci_low"] is None else f"{_number(item['ci_low'])} to {_number(item['ci_high'])}"
                table.add_row(f"  {item['label']}", _number(item["estimate"]), _number(item["std_error"]),
                              _number(item["statistic"], 3), _number(item["p_value"], 2), low, "", "")
    return table


def gains_table(fitted: FittedModel) -> Table:
    """The holdout's lift / gains table: deciles of the prediction from the highest down."""
    from rich.table import Table

    table = Table(title=f"{fitted.model}: gains by decile of the prediction on {fitted.metrics['rows']} held-out rows")
    for heading in ("decile", "rows", "events", "event rate", "share of events caught", "lift"):
        table.add_column(heading, justify="right")
    for entry in fitted.metrics["gains"]:
        table.add_row(str(entry["decile"]), str(entry["rows"]), str(entry["events"]), _number(entry["event_rate"]),
                      _number(entry["cumulative_event_share"]), _number(entry["lift"], 3))
    return table


def _print_fit_summary(fitted: FittedModel) -> None:
    out.print(coefficient_table(fitted))
    fit = fitted.fit
    criteria = f"AIC {fit['aic']:.2f}, BIC {fit['bic']:.2f}" if fit["aic"] is not None else "no AIC or BIC (no likelihood)"
    out.print(f"deviance {fit['deviance']:.4f} (null {fit['null_deviance']:.4f}), {criteria}, "
              f"{'converged' if fit['converged'] else 'NOT converged'} in {fit['iterations']} iterations"
              + (f", Pearson chi2/df {fit['pearson_dispersion']:.3f}" if "pearson_dispersion" in fit else ""))
    holdout = fitted.metrics
    if holdout.get("rows"):
        shown = {k: v for k, v in holdout.items() if isinstance(v, (int, float)) and not isinstance(v, bool)}
        out.print("holdout: " + ", ".join(f"{k} {_number(v)}" for k, v in shown.items()))
    crossval = fitted.crossval
    if crossval:
        spread = ", ".join(f"{k} {_number(v)} ± {_number(crossval['sd'][k], 2)}" for k, v in crossval["mean"].items())
        chosen = f"; l2 {crossval['l2']['chosen']:g} chosen on a grid" if "l2" in crossval else ""
        out.print(f"cross-validation ({crossval['folds']} folds, mean ± sd): {spread}{chosen}")
    for warning in fitted.warnings:
        out.print(f"[yellow]warning:[/yellow] {warning}")


ModelsArgument = Annotated[Optional[list[str]], typer.Argument(help="Models to fit (default: all).")]


@app.command()
def fit(models: ModelsArgument = None, project: ProjectOption = None, json_output: JsonOption = False) -> None:
    """Fit models in the engine, write fitted/MODEL.yaml and print the coefficient table."""
    from . import api
    from .project import load_project

    outcomes = api.fit(load_project(project), models, **_as_fitted(json_output))
    if json_output:
        _print_json_outcomes(outcomes)


def _as_fitted(json_output: bool) -> dict:
    """Progress and each model's table as soon as its file is written; JSON waits for the whole list."""
    return {} if json_output else {"progress": _progress, "fitted": _print_outcome}


def _print_json_outcomes(outcomes: list[FitOutcome]) -> None:
    _print_json([{"model": o.model, "path": str(o.path), "changed": o.changed, "fitted": asdict(o.fitted)} for o in outcomes])


def _print_outcome(outcome: FitOutcome) -> None:
    _print_fit_summary(outcome.fitted)
    out.print(f"wrote {outcome.path}" + ("" if outcome.changed else " (unchanged)"))


@app.command()
def explain(
    name: Annotated[str, typer.Argument(help="A term or a model.")],
    project: ProjectOption = None,
    json_output: JsonOption = False,
) -> None:
    """Show a term's definition with its coefficients and notes in every model, or a whole model."""
    from rich.syntax import Syntax

    from . import api
    from .fitted import read_fitted
    from .fitted.explain import explain as describe
    from .fitted.explain import learned_lines
    from .project import load_project

    loaded = load_project(project)
    found = describe(api.check(loaded), name)
    if json_output:
        _print_json(found)
        return
    if found["kind"] == "model":
        fitted = read_fitted(loaded.fitted_path(name))
        _print_fit_summary(fitted)
        if fitted.metrics.get("gains"):
            out.print(gains_table(fitted))
        for reason in found["stale"]:
            out.print(f"[red]stale:[/red] {reason}")
        return
    out.print(f"[bold]{name}[/bold]  ({found['where']}, input {found['input']}, fingerprint {found['fingerprint']})")
    if found["doc"]:
        out.print(found["doc"])
    out.print(Syntax(found["sql"], "sql", word_wrap=True))
    if found["built_from"]:
        out.print(f"built from: {', '.join(found['built_from'])}")
    for use in found["models"]:
        term = use["fitted"]
        if term is None:
            out.print(f"model {use['model']}: not fitted yet")
            continue
        if term["estimate"] is None:  # a learned term of several columns: its columns under it
            out.print(f"model {use['model']}:")
        elif term["p_value"] is None:
            out.print(f"model {use['model']}: estimate {term['estimate']:.4g}, no interval or p-value (a penalized fit)")
        else:
            out.print(f"model {use['model']}: estimate {term['estimate']:.4g} (95% interval {term['ci_low']:.4g} to "
                      f"{term['ci_high']:.4g}), p {_number(term['p_value'], 2)}")
        for line in learned_lines(term["learned"]) if term["learned"] else ():
            out.print(f"  {line}", markup=False, highlight=False)
        for note in term["notes"] if term["estimate"] is not None else ():
            out.print(f"  - {note}")
        for reason in use["stale"]:
            out.print(f"  [red]stale:[/red] {reason}")


@app.command()
def refresh(project: ProjectOption = None, json_output: JsonOption = False) -> None:
    """Check, then bring every stale design table and fit up to date."""
    from . import api
    from .project import load_project

    outcomes = api.refresh(load_project(project), **_as_fitted(json_output))
    if json_output:
        _print_json_outcomes(outcomes)
    elif not outcomes:
        out.print("everything is up to date")


@app.command()
def report(
    model: Annotated[str, typer.Argument(help="A fitted model (fitted/MODEL.yaml).")],
    project: ProjectOption = None,
    output: Annotated[Optional[Path], typer.Option("--out", "-o", help="HTML file to write (default: build/reports/MODEL.html).")] = None,
    against: Annotated[Optional[str], typer.Option("--against", help="Compare with this model of the same target.")] = None,
    pair: Annotated[Optional[str], typer.Option("--pair", help="Two numeric inputs for the decision surface, as a,b.")] = None,
    json_output: JsonOption = False,
    allow_stale: Annotated[bool, typer.Option("--allow-stale", help="Report even if the model changed since its fit (the page says what changed).")] = False,
) -> None:
    """Write a self-contained HTML report of a fitted model with plots, optionally compared with another model."""
    from .fitted.report import write_report
    from .project import load_project

    chosen = tuple(part.strip() for part in pair.split(",")) if pair is not None else None
    path = write_report(load_project(project), model, against=against, pair=chosen, out=output, allow_stale=allow_stale)
    if json_output:
        _print_json({"model": model, "against": against, "path": str(path)})
        return
    out.print(f"wrote {path}")


@app.command()
def drift(
    model: Annotated[str, typer.Argument(help="Model name (fitted/NAME.yaml).")],
    table: Annotated[str, typer.Option("--table", "-t", help="The batch to compare with the model's training rows.")],
    project: ProjectOption = None,
    json_output: JsonOption = False,
    fail_above: Annotated[Optional[list[str]], typer.Option(
        "--fail-above", help="Exit 1 when a figure is above a limit: LIMIT for any term's or the score's PSI (0.25: a "
        "major shift), or NAME=LIMIT for shift, outside, null_rise or unseen; repeat for several.")] = None,
    allow_stale: Annotated[bool, typer.Option("--allow-stale", help="Compare even if the model's terms changed since its fit.")] = False,
    history: Annotated[Optional[str], typer.Option(
        "--history", help="Add the batch under this period (2026-06 or 2026-06-30) to fitted/MODEL.drift.yaml.")] = None,
) -> None:
    """Stability of each term and of the score in a batch against the training rows (population stability index)."""
    from .fitted.drift import drift as compare
    from .fitted.drift import parse_limits
    from .fitted.drift_history import check_period, record_drift
    from .project import load_project

    limits = parse_limits(fail_above or [])
    if history is not None:
        check_period(history)
    loaded = load_project(project)
    report = compare(loaded, model, table, allow_stale=allow_stale, progress=None if json_output else _progress)
    if history is not None:
        written = record_drift(loaded, report, history)
        if not json_output:
            out.print(f"added {history} to {written}")
    if json_output:
        _print_json(report.as_dict())
    else:
        out.print(drift_table(report))
        out.print("terms ranked by how far their mean contribution to the linear predictor moved (0 in training); "
                  "PSI over the training deciles with NULL as a bin of its own, empty bins counted as 0.0001; "
                  "below 0.1 stable, 0.1 to 0.25 a moderate shift, above 0.25 a major shift (common practice); "
                  "a reading is also moderate from 1% and major from 5% of rows outside the training range, and for "
                  "the score from a mean shift of 0.1 and 0.25 training sd (rules of thumb)")
        if report.score.reasons:
            out.print(f"score: {report.score.reading} ({'; '.join(report.score.reasons)})", markup=False)
        out.print(input_health_table(report) if report.inputs is not None else
                  "input columns: the fitted file records no input profiles; fit again to compare NULL rates and levels")
        for row in report.terms:
            if any(item.label for item in row.bins):  # a LEVELS term: its bins are levels, other and unseen
                shown = ", ".join(f"{item.label} {item.actual:.1%} ({item.expected:.1%})" for item in row.bins)
                out.print(f"{row.name} by level, batch (training): {shown}", markup=False, highlight=False)
            if row.unseen:
                levels = ", ".join(f"{level} ({rows} rows)" for level, rows in row.unseen)
                out.print(f"[yellow]unseen levels of {row.name}:[/yellow] {levels}", highlight=False)
        for reason in report.stale:
            out.print(f"[red]stale:[/red] {reason}")
    over = report.over_limits(limits)
    if over:
        err.print("\n".join(over), markup=False)
        raise typer.Exit(1)


def input_health_table(report) -> Table:
    """One line per input column a term reads: its NULL rate against training and (text) the unseen levels."""
    from rich.table import Table

    table = Table(title="input columns against the training rows")
    for heading in ("column", "NULL (training)", "NULL rise", "unseen levels"):
        table.add_column(heading, justify="left" if heading == "column" else "right")
    for item in report.inputs:
        table.add_row(item.name, f"{item.null_share:.1%} ({item.training_null_share:.1%})", f"{item.null_rise:+.1%}",
                      "" if item.unseen_share is None else f"{item.unseen_share:.1%}")
    return table


def drift_table(report) -> Table:
    """One line per term (ranked by |shift|) and one for the score."""
    from rich.table import Table

    table = Table(title=f"{report.model}: table {report.table}, {report.rows} rows against the training rows")
    for heading in ("rank", "term", "PSI", "reading", "shift", "NULL (training)", "below min", "above max"):
        table.add_column(heading, justify="left" if heading in ("term", "reading") else "right")

    def share(value: float) -> str:
        return f"{value:.1%}"

    for row in (*report.terms, report.score):
        name = "score (linear predictor)" if row.rank is None else row.name
        table.add_row(
            "" if row.rank is None else str(row.rank), name, f"{row.psi:.4f}", row.reading, _number(row.shift, 3),
            f"{share(row.null_share)} ({share(row.training_null_share)})", share(row.below_min_share), share(row.above_max_share),
            end_section=row.rank == len(report.terms),
        )
    return table


@app.command()
def evaluate(
    model: Annotated[str, typer.Argument(help="Model name (fitted/NAME.yaml).")],
    table: Annotated[str, typer.Option("--table", "-t", help="A labelled table: an input of featpipe.yaml with the target column.")],
    by: Annotated[Optional[str], typer.Option("--by", help="Batch by a column's values or by month_of(COLUMN): one row per period.")] = None,
    project: ProjectOption = None,
    json_output: JsonOption = False,
) -> None:
    """Measure a fitted model on a labelled table with the holdout metrics; write fitted/MODEL.evaluations/TABLE.yaml."""
    from . import api
    from .project import load_project

    evaluation, path = api.evaluate(load_project(project), model, table, by, progress=None if json_output else _progress)
    if json_output:
        _print_json({"path": str(path), "evaluation": asdict(evaluation)})
        return
    out.print(evaluation_table(evaluation))
    out.print(f"wrote {path}")


def evaluation_table(evaluation) -> Table:
    """One line for the whole table, then one per period: the stability table."""
    from rich.table import Table

    from .fitted.evaluations import stability_row

    table = Table(title=f"{evaluation.model} on {evaluation.table}, {evaluation.table_rows} rows"
                  + (f", by {evaluation.by}" if evaluation.by else ""))
    for heading in ("period", "rows", "AUC", "mean observed", "mean predicted", "observed / predicted"):
        table.add_column(heading, justify="left" if heading == "period" else "right")
    batches = [("all", evaluation.metrics)] + [(item["period"], item["metrics"]) for item in evaluation.periods]
    for index, (label, metrics) in enumerate(batches):
        row = stability_row(metrics)
        table.add_row(label, str(row["rows"]), _number(row["auc"]), _number(row["mean_observed"]),
                      _number(row["mean_predicted"]), _number(row["observed_to_predicted"], 3), end_section=index == 0)
    return table


class DiffFormat(str, Enum):
    text = "text"
    markdown = "markdown"


@app.command()
def diff(
    project: ProjectOption = None,
    since: Annotated[Optional[str], typer.Option(
        "--since", help="Git revision to compare with (default: the merge base with the default branch, else HEAD).")] = None,
    json_output: JsonOption = False,
    format: Annotated[DiffFormat, typer.Option("--format", help="text, or markdown to post as a review comment.")] = DiffFormat.text,
    fail_on_stale: Annotated[bool, typer.Option(
        "--fail-on-stale", help="Exit 1 when a change leaves a fitted model stale (for CI gates).")] = False,
) -> None:
    """What changed in meaning since a git revision, and which fits went stale."""
    from .review.diff import diff_project
    from .review.formats import render_markdown, render_text

    change = diff_project(project, since)
    if json_output:
        _print_json(change.as_dict())
    elif format == DiffFormat.markdown:
        print(render_markdown(change), end="")
    else:
        print(render_text(change), end="")
    if fail_on_stale and change.left_stale:
        raise typer.Exit(1)


@app.command()
def suggest(
    model: Annotated[str, typer.Argument(help="A fitted model (fitted/MODEL.yaml) whose terms to extend.")],
    project: ProjectOption = None,
    top: Annotated[int, typer.Option("--top", min=1, help="How many candidates to show (and to write with --into).")] = 10,
    max_candidates: Annotated[int, typer.Option("--max-candidates", min=1, help="Test at most this many candidates.")] = 500,
    min_rows: Annotated[int, typer.Option("--min-rows", min=1, help="Training rows a text level needs to become an indicator.")] = 30,
    into: Annotated[Optional[Path], typer.Option("--into", help="Write the top candidates as a term file, e.g. terms/proposed_MODEL.sql.")] = None,
    force: Annotated[bool, typer.Option("--force", help="Replace the --into file if it exists.")] = False,
    json_output: JsonOption = False,
) -> None:
    """Candidate terms the model is missing, ranked by score tests at its current fit, computed in the engine."""
    from . import api
    from .fitting.suggest import CAUTION
    from .project import load_project

    loaded = load_project(project)
    if into is not None and not force:  # refuse before the work, not after it
        target = into if into.is_absolute() else loaded.root / into
        if target.exists():
            raise FeatpipeError(f"{target} already exists; pass --force to replace it, or choose another --into file")
    report = api.suggest(loaded, model, top=top, max_candidates=max_candidates, min_rows=min_rows,
                         progress=None if json_output else _progress)
    written = api.write_proposed(loaded, report, into, force) if into is not None else None
    if json_output:
        _print_json({**report.as_dict(), "written": None if written is None else str(written)})
        return
    out.print(suggest_table(report))
    dropped = ", ".join(f"{reason} {count}" for reason, count in report.dropped.items()) or "none"
    out.print(f"{report.generated} candidates generated, {report.considered} considered (--max-candidates), "
              f"{report.tested} tested; dropped: {dropped}; {report.scans} scans of the {report.training_rows} training rows",
              markup=False)
    for suggestion in report.shown:
        out.print(f"{suggestion.rank}. {suggestion.line(report.tested)}", markup=False)
    out.print(f"caution: {CAUTION}", markup=False)
    if written is not None:
        out.print(f"wrote {written}", markup=False)


def suggest_table(report) -> Table:
    """The top candidates with their score tests."""
    from rich.table import Table
    from rich.text import Text

    table = Table(title=f"{report.model}: candidate terms by score test at the current fit ({report.family}, "
                        f"{report.training_rows} training rows)")
    for heading in ("rank", "term", "SQL", "statistic", "p (Holm)", "one-step estimate", "deviance gain", "NULL"):
        table.add_column(heading, justify="left" if heading in ("term", "SQL") else "right")
    for s in report.shown:
        table.add_row(str(s.rank), Text(s.name), Text(s.sql), f"{s.statistic:.4g}", _number(s.p_holm, 2), f"{s.estimate:.4g}",
                      f"{s.deviance_gain:.4g}", f"{s.null_share:.1%}")
    return table


def main(args: list[str] | None = None) -> None:
    """Console entry point: map user errors to exit 1 and bugs to exit 2, never a bare traceback.

    `args` are the command line's words (default: the process's); tests pass them to run a command in
    process exactly as a user's would run.
    """
    try:
        # standalone_mode=False returns the code of a typer.Exit instead of raising; the program name is the
        # command users type, also when featpipe runs inside another program (tests, a scheduler).
        status = app(args=args, prog_name="featpipe", standalone_mode=False)
    except FeatpipeError as error:
        err.print(f"error: {error}", markup=False)
        if os.environ.get("FEATPIPE_DEBUG"):  # with what the engine's driver said, cause by cause
            traceback.print_exc()
        sys.exit(1)
    except typer.Exit as done:
        sys.exit(done.exit_code)
    except (typer.Abort, KeyboardInterrupt):
        err.print("interrupted")
        sys.exit(1)
    except typer.TyperException as error:  # wrong or missing arguments: the usage and what is wrong, exit 2
        error.show()
        sys.exit(error.exit_code if error.exit_code != 0 else 1)
    except Exception as error:  # noqa: BLE001 - the last line of defence
        err.print(f"internal error: {type(error).__name__}: {error}", markup=False)
        if os.environ.get("FEATPIPE_DEBUG"):
            traceback.print_exc()
        else:
            err.print("set FEATPIPE_DEBUG=1 to see the traceback, and please report it")
        sys.exit(2)
    sys.exit(status if isinstance(status, int) else 0)
