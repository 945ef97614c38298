"""`featpipe fit`: fit a model on its design table in the engine and build its fitted file.

Row accounting, the training profiles and the holdout metrics are queries whose small results come
back; the GLM's sufficient statistics are summed over the design columns streamed out of the engine
(DuckDB), copied out once (PostgreSQL) or summed in the engine (Spark), see featpipe.glm.fit.
"""

from __future__ import annotations

import dataclasses
from typing import TYPE_CHECKING

from sqlglot import exp

from ..compiler import CompiledModel, CompiledProject, Term
from ..engines.base import Engine
from ..engines.builds import input_signature, read_builds
from ..errors import FeatpipeError
from ..fitted import INTERCEPT, FittedModel, FittedTerm, as_written
from ..fitted.conventions import conventions
from ..fitted.notes import effect, effect_step, term_notes
from ..project import InputSpec
from ..project.names import LINEAR_PREDICTOR
from ..sqlgen.accounting import dropped_reasons, imputed_rows_query, imputing_terms, row_accounting_query
from ..sqlgen.common import column
from ..sqlgen.metrics import linear_predictor, scored_holdout
from ..sqlgen.trials import as_trials
from .beside import beside
from .learned import column_names, expand, learn_constants, learned_entry, profiled_arguments, unseen_holdout_rows
from .groups import group_tables
from .inputs import input_profiles
from .metrics import holdout_metrics, scored_rows_metrics, training_profiles

if TYPE_CHECKING:
    from ..glm import Coefficient

def account_rows(engine: Engine, model: CompiledModel, source: InputSpec) -> dict:
    """Rows of the design table: all, training, holdout, and dropped per reason (refused above the limit);
    and per term, the input's rows its definition filled in although an input it reads is NULL."""
    layout, spec = model.layout, model.spec
    values = engine.fetch(row_accounting_query(layout))[0]
    total, incomplete, train, holdout = (int(v or 0) for v in values[:4])
    dropped = {reason: int(count or 0) for (reason, _), count in zip(dropped_reasons(layout), values[4:]) if count}
    if total == 0:
        raise FeatpipeError(f"{spec.display}: the design table {layout.table} has no rows; check the input table '{spec.input}'")
    share = incomplete / total
    if share > spec.max_dropped:
        detail = ", ".join(f"{reason}: {count}" for reason, count in dropped.items())
        raise FeatpipeError(
            f"{spec.display}: {incomplete} of {total} rows ({share:.1%}) have a NULL target, offset, weight or term "
            f"({detail}), more than max_dropped {spec.max_dropped:g}; fix the data or the terms (guard divisions, "
            "COALESCE missing inputs), or raise max_dropped in the spec if dropping them is right"
        )
    return {"input": total, "complete": total - incomplete, "train": train, "holdout": holdout, "dropped": dropped,
            "imputed": _imputed(engine, model, source)}


def _imputed(engine: Engine, model: CompiledModel, source: InputSpec) -> dict[str, int]:
    terms = imputing_terms(list(model.terms))
    if not terms:
        return {}
    counts = engine.fetch(imputed_rows_query(terms, source))[0]
    return {term.name: int(count) for term, count in zip(terms, counts, strict=True) if count}


def fit_model(engine: Engine, compiled: CompiledProject, model: CompiledModel) -> FittedModel:
    """Fit one model whose design table is current in `engine`."""
    # numpy and scipy load when a model is fitted, not with the API (`featpipe check` never fits).
    from ..glm import Glm
    from ..glm.dispersion import pearson_ratio
    from .crossval import chosen_penalty, cross_validation

    spec, layout = model.spec, model.layout
    rows = account_rows(engine, model, compiled.project.inputs[spec.input])
    # Learned terms: constants from the training rows, then a table of their design columns to fit on.
    constants = learn_constants(engine, model) if any(term.learned for term in model.terms) else {}
    fit_layout = expand(engine, model, constants) if constants else layout
    if any(found.call.function == "LEVELS" for found in constants.values()):
        rows["unseen"] = unseen_holdout_rows(engine, model, constants)
    profiled = {name: column(name) for name in (*fit_layout.terms, *profiled_arguments(constants))}
    declared = compiled.project.inputs[spec.input].columns
    read = {name: declared[name] for name in sorted({c for t in model.terms for c in t.columns})}
    with beside(engine) as start:  # what needs no coefficients is read on a second connection meanwhile
        term_profiles = start(training_profiles, fit_layout, profiled)
        health = start(input_profiles, spec.input, layout.key, spec.holdout, read)
        choice = chosen_penalty(engine, fit_layout, spec)
        glm = Glm(spec.family, choice.penalty, frequency_weights=spec.weight_kind == "frequency", power=spec.power,
                  errors=spec.errors, trials=spec.trials is not None).fit(engine, fit_layout)
        # Profiles and metrics describe the model as its file writes it, so scoring the file reproduces them.
        coefficients = {c.name: as_written(c.estimate) for c in glm.coefficients}
        predictor_profile = start(training_profiles, fit_layout, {LINEAR_PREDICTOR: linear_predictor(fit_layout, coefficients)})
        if spec.trials:  # each trial read as a 0/1 row: the successes as events, the failures as non-events
            metrics = scored_rows_metrics(engine, as_trials(scored_holdout(fit_layout, coefficients, counted=True)), spec.family,
                                          spec.threshold, counted=True)
        else:
            metrics = holdout_metrics(engine, fit_layout, spec.family, coefficients, spec.threshold,
                                      spec.weight_kind == "frequency", power=spec.power)
        crossval = cross_validation(engine, fit_layout, spec, choice, coefficients) if spec.folds else {}
        groups = group_tables(engine, scored_holdout(fit_layout, coefficients), spec.input, layout.key, spec.groups, spec.family,
                              spec.threshold)
        profiles = {**term_profiles(), **predictor_profile()}
    intercept, *slopes = glm.coefficients
    by_column = dict(zip(fit_layout.terms, slopes, strict=True))
    fitted_terms = [_fitted_term(intercept, None, spec, model, None)]
    training_sd = {name: training.sd for name, training in zip(fit_layout.terms, glm.rows.term_profiles, strict=True)}
    for term in model.terms:
        if term.name not in constants:
            fitted_terms.append(_fitted_term(by_column[term.name], term, spec, model, profiles[term.name], training_sd[term.name]))
            continue
        entry = learned_entry(term.name, constants[term.name], glm.coefficients, glm.covariance, glm.names, spec.family,
                              {name: profiles[name].mean for name in fit_layout.terms},
                              input_signature(compiled.project.inputs[spec.input], read_builds(engine)))  # remembered: no re-hash
        fitted_terms.append(_learned_term(term, entry, by_column, profiles, training_sd, spec, model))
    return FittedModel(
        model=spec.name,
        fingerprint=model.fingerprint,
        input=spec.input,
        key=layout.key,
        target=spec.target,
        family=spec.family,
        link=glm.link,
        offset=model.offset_sql,
        weights=model.dependencies["weights"],
        holdout=spec.holdout.record(),
        threshold=spec.threshold,
        penalty=spec.penalty.record(),
        columns=_read_columns(compiled, model),
        rows=rows,
        fit={
            "converged": bool(glm.convergence.converged),
            "iterations": int(glm.convergence.iterations),
            "passes": int(glm.convergence.passes_over_data),  # full reads of the training rows by the fit
            "deviance": float(glm.goodness_of_fit.deviance),
            "null_deviance": float(glm.goodness_of_fit.null_deviance),
            # None where the family has no log-likelihood a sum gives (tweedie, the quasi families)
            "log_likelihood": glm.goodness_of_fit.log_likelihood,
            "aic": glm.goodness_of_fit.aic,
            "bic": glm.goodness_of_fit.bic,
            "dispersion": float(glm.goodness_of_fit.dispersion),
            "statistic": glm.statistic_name,
            "penalized": spec.penalty.active,
            "effective_df": float(glm.goodness_of_fit.effective_df),
            "observations": float(glm.rows.n),
            "pearson_chi2": float(glm.goodness_of_fit.pearson_chi2),
            "pearson_dispersion": float(pearson_ratio(glm.goodness_of_fit.pearson_chi2, glm.rows.df_residual)),
            "conventions": conventions(statistic=glm.statistic_name, penalized=spec.penalty.active, family=spec.family,
                                       errors=spec.errors),
            # how the sandwich standard errors were made; left out for the model's own
            **({"errors": {**glm.robust_errors.record(), **({"column": spec.cluster} if spec.cluster else {})}}
               if glm.robust_errors is not None else {}),
            **({"power": spec.power} if spec.power is not None else {}),
        },
        terms=tuple(fitted_terms),
        linear_predictor=profiles[LINEAR_PREDICTOR],
        metrics=metrics,
        crossval=crossval,
        input_profiles=health(),
        group_tables=groups,
        warnings=tuple(glm.warnings),
        depends_on=model.dependencies,
    )


def _read_columns(compiled: CompiledProject, model: CompiledModel) -> dict[str, str]:
    """The contract of what the fitted model reads, so its scoring SQL can be built from the file alone."""
    declared = compiled.project.inputs[model.spec.input].columns
    read = {model.layout.key, *(name for term in model.terms for name in term.columns)}
    if model.offset is not None:
        read.update(node.name for node in model.offset.find_all(exp.Column))
    return {name: declared[name] for name in sorted(read)}


def _learned_term(term: Term, entry: dict, by_column, profiles, training_sd, spec, model: CompiledModel) -> FittedTerm:
    """A learned term as one entry: CAPPED (one column) reads like any term; a term of several columns
    has no single estimate, its columns and joint test are in `learned`."""
    names = column_names(term.name, len(entry["columns"]))
    if term.learned.function == "CAPPED":
        single = _fitted_term(by_column[names[0]], term, spec, model, profiles[names[0]], training_sd[names[0]])
        return dataclasses.replace(single, learned=entry)
    notes = tuple(item["reading"] for item in entry["columns"])
    if entry["wald"] is not None:
        wald = entry["wald"]
        notes += (f"joint Wald test of its {wald['df']} columns: chi-square {wald['statistic']:.3g}, "
                  f"p = {wald['p_value']:.3g}",)
    return FittedTerm(name=term.name, estimate=None, std_error=None, statistic=None, p_value=None, ci_low=None,
                      ci_high=None, fingerprint=term.fingerprint, sql=term.sql, kind=term.kind, doc=term.doc,
                      columns=term.columns, built_from=term.built_from, notes=notes, learned=entry,
                      profile=profiles.get(term.name))  # BINS, SPLINE: the argument's profile


def _fitted_term(coefficient: Coefficient, term: Term | None, spec, model: CompiledModel, profile, training_sd=None) -> FittedTerm:
    estimate = coefficient.estimate
    # The fitted file names the Wald figures as the GLM result does; all None for a penalized fit.
    common = dict(estimate=estimate, **coefficient.inference_figures())
    low, high = common["ci_low"], common["ci_high"]
    if term is None:
        return FittedTerm(name=INTERCEPT, **common)
    step, basis = effect_step(term.kind, spec.step.get(term.name), training_sd)
    others = [t for t in model.terms if t.name != term.name]
    related = sorted(
        {t.name for t in others if set(t.columns) & set(term.columns)}
        | {name for name in term.built_from if name in spec.terms}
        | {t.name for t in others if term.name in t.built_from}
    )
    vif = coefficient.vif
    notes = term_notes(
        name=term.name, family=spec.family, target=spec.target, estimate=estimate, ci_low=low, ci_high=high,
        p_value=common["p_value"], step=step, kind=term.kind, expect=spec.expect.get(term.name), vif=vif, related=related,
        human_note=spec.notes.get(term.name), penalized=spec.penalty.active, basis=basis,
    )
    return FittedTerm(
        name=term.name, **common, fingerprint=term.fingerprint, sql=term.sql, kind=term.kind, doc=term.doc,
        columns=term.columns, built_from=term.built_from,
        effect=effect(spec.family, estimate, low, high, step, basis), vif=vif, profile=profile, notes=notes,
    )
