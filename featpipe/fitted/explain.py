"""`featpipe explain NAME`: everything known about a term or a model, gathered from the compiled
project and the fitted files (nothing is recomputed)."""

from __future__ import annotations

import difflib
from dataclasses import asdict

from ..compiler import CompiledProject
from ..compiler.learned import call_sql
from ..errors import FeatpipeError
from . import FittedModel, read_fitted, staleness
from .learned import VALUES_NAMED


def _fitted_models(compiled: CompiledProject) -> dict[str, FittedModel]:
    found = {}
    for name in compiled.models:
        path = compiled.project.fitted_path(name)
        if path.is_file():
            found[name] = read_fitted(path)
    return found


def explain(compiled: CompiledProject, name: str) -> dict:
    """A plain description of a model (by name) or of a term (in every model that uses it)."""
    fitted = _fitted_models(compiled)
    if name in compiled.models:
        model = compiled.models[name]
        if name not in fitted:
            raise FeatpipeError(f"model '{name}' has no fitted file yet; run `featpipe fit {name}`")
        return {
            "kind": "model",
            "name": name,
            "spec": model.spec.display,
            "stale": staleness(fitted[name], model, compiled.project.inputs),
            "fitted": asdict(fitted[name]),
        }
    term = compiled.terms.get(name)
    in_models = [model for model in compiled.models.values() if name in model.layout.terms]
    if term is None and not in_models:
        known = sorted(set(compiled.terms) | set(compiled.models))
        hint = difflib.get_close_matches(name, known, n=1)
        raise FeatpipeError(f"'{name}' is neither a term nor a model" + (f"; did you mean '{hint[0]}'?" if hint else ""))
    if term is None:  # an input column used directly as a term
        term = next(t for t in in_models[0].terms if t.name == name)
    uses = []
    for model in in_models:
        entry = {"model": model.name, "fitted": None, "stale": []}
        if model.name in fitted:
            entry["fitted"] = asdict(fitted[model.name].term(name)) if _has(fitted[model.name], name) else None
            entry["stale"] = staleness(fitted[model.name], model, compiled.project.inputs)
        uses.append(entry)
    return {
        "kind": "term",
        "name": name,
        "input": term.input,
        "where": f"{term.file}:{term.line}:{term.col}",
        "doc": term.doc,
        "sql": call_sql(term.learned, term.inlined) if term.learned else term.sql,
        "fingerprint": term.fingerprint,
        "built_from": list(term.built_from),
        "columns": list(term.columns),
        "models": uses,
    }


def _has(fitted: FittedModel, name: str) -> bool:
    return any(term.name == name for term in fitted.terms)


def learned_lines(learned: dict) -> list[str]:
    """A learned term's constants, then each column with its estimate, interval and reading, then the
    joint Wald test: what `explain TERM` shows under the term in a model."""
    arguments = ", ".join(f"{value:g}" for value in learned["arguments"])
    lines = [f"learned {learned['function']}(…, {arguments}) from the training rows:"]
    if learned["function"] == "LEVELS":
        pooled = set(learned["pooled"])
        levels = [f"{item['level']} {item['rows']}" + (" (reference)" if item["level"] == learned["reference"]
                                                        else " (pooled into other)" if item["level"] in pooled else "")
                  for item in learned["levels"]]
        lines.append(f"  levels with their training rows: {', '.join(levels)}")
    else:
        named = VALUES_NAMED[learned["function"]]
        lines.append(f"  {named}: {', '.join(f'{value:.15g}' for value in learned['values'])}")
    if learned["function"] == "CAPPED":  # one column: the term's own estimate and notes say the rest
        return lines
    lines.append("  columns:")
    for item in learned["columns"]:
        interval = "" if item["ci_low"] is None else f" (95% interval {item['ci_low']:.4g} to {item['ci_high']:.4g})"
        p_value = "" if item["p_value"] is None else f", p {item['p_value']:.2g}"
        lines.append(f"    {item['label']}: estimate {item['estimate']:.4g}{interval}{p_value}; {item['reading']}")
    wald = learned.get("wald")
    if wald:
        lines.append(f"  joint Wald test of its {wald['df']} columns: chi-square {wald['statistic']:.4g}, "
                     f"p = {wald['p_value']:.3g}")
    return lines
