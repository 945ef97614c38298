"""`featpipe explain NAME`: everything known about a term or a model, gathered from the compiled
project and the fitted files (nothing is recomputed)."""

from __future__ import annotations

import difflib
from dataclasses import asdict

from ..compiler import CompiledProject
from ..errors import FeatpipeError
from . import FittedModel, read_fitted, staleness


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
            "stale": staleness(fitted[name], model),
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
            entry["stale"] = staleness(fitted[model.name], model)
        uses.append(entry)
    return {
        "kind": "term",
        "name": name,
        "input": term.input,
        "where": f"{term.file}:{term.line}:{term.col}",
        "doc": term.doc,
        "sql": term.sql,
        "fingerprint": term.fingerprint,
        "built_from": list(term.built_from),
        "columns": list(term.columns),
        "models": uses,
    }


def _has(fitted: FittedModel, name: str) -> bool:
    return any(term.name == name for term in fitted.terms)
