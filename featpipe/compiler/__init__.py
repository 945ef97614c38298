"""The term compiler: passes over sqlglot trees that turn term files and model specs into checked,
inlined, fingerprinted terms.

Passes, each a module with one public function: parse (files to raw terms), allowlist
(deterministic scalar SQL only), resolve (names to columns or terms), inline (dependency order,
cycles, inlining), types (numeric or boolean), canonical (canonical SQL and fingerprint), leakage
(no term reads the target). `compile_project` runs them all and raises every error at once.
"""

from __future__ import annotations

import dataclasses
import difflib
import hashlib
import json
from collections.abc import Sequence
from dataclasses import dataclass, field

import sqlglot
from sqlglot import exp
from sqlglot.errors import ParseError, TokenError
from sqlglot.optimizer.normalize_identifiers import normalize_identifiers

from ..errors import Diagnostic, raise_if_errors
from ..project import PROJECT_FILE, ModelSpec, Project
from ..project.names import (
    CLUSTER_COLUMN,
    NAME_PATTERN,
    OFFSET_COLUMN,
    WEIGHT_COLUMN,
    design_table_name,
    reserved_reason,
)
from .allowlist import check_allowed
from .canonical import canonical_sql, canonical_tree, fingerprint_of_sql
from .inline import (
    MAX_INLINED_DEPTH,
    MAX_INLINED_NESTING,
    MAX_INLINED_NODES,
    dependency_order,
    inline_terms,
    inlined_shape,
)
from .layout import DesignLayout
from .leakage import target_paths
from .learned import LearnedCall, argument_type, call_sql, is_learned, learned_call, nested_learned
from .parse import TERM_DIALECT, RawTerm, nesting_depth, node_position, parse_term_file
from .resolve import resolve_names, with_declared_columns
from .types import term_type


@dataclass(frozen=True)
class Term:
    """A checked term: its expression as written and fully inlined, its canonical SQL and fingerprint."""

    name: str
    input: str
    file: str
    line: int
    col: int
    doc: str
    kind: str  # "numeric" or "boolean"
    sql: str  # canonical SQL of the inlined expression (input columns only)
    fingerprint: str
    uses: tuple[str, ...]  # terms it names directly
    built_from: tuple[str, ...]  # every term it depends on, directly or not
    columns: tuple[str, ...]  # input columns it reads, directly or through other terms
    expression: exp.Expression = field(compare=False, repr=False)  # as written
    inlined: exp.Expression = field(compare=False, repr=False)  # canonical tree, input columns only
    # A learned term (LEVELS, BINS, SPLINE, CAPPED): `expression`, `inlined` and `sql` are its argument,
    # `kind` the argument's ("text" for LEVELS) and `fingerprint` covers the whole call.
    learned: LearnedCall | None = None


@dataclass(frozen=True)
class CompiledModel:
    spec: ModelSpec
    terms: tuple[Term, ...]
    offset: exp.Expression | None  # canonical tree over input columns
    offset_sql: str | None
    layout: DesignLayout
    fingerprint: str  # of everything that decides the design table and the fit

    @property
    def name(self) -> str:
        return self.spec.name

    @property
    def dependencies(self) -> dict[str, object]:
        return fit_dependencies(self.spec, self.layout.key, self.terms, self.offset_sql)


def fit_dependencies(spec: ModelSpec, key: str, terms: Sequence[Term], offset_sql: str | None) -> dict[str, object]:
    """What a fit depends on, in a fixed order: every spec field that changes the fitted file or whether
    the fit runs, the input's key (it decides the holdout split), the offset as canonical SQL, and
    each term's fingerprint in model order.

    One mapping decides the model's fingerprint, names what changed when a fit goes stale, and is
    written into the fitted file as `depends_on`, so that a later edit can be named against it.
    Per-term settings are sorted by term: their order in the spec changes nothing.
    """
    return {
        "input": spec.input,
        "key": key,
        "target": spec.target,
        "family": spec.family,
        **({"power": spec.power} if spec.power is not None else {}),  # tweedie only: other fits keep their fingerprint
        "offset": offset_sql,
        # A bare column is a variance weight, as written before frequency weights existed.
        "weights": {"column": spec.weights, "kind": spec.weight_kind} if spec.weight_kind == "frequency" else spec.weights,
        "holdout": spec.holdout.record(),
        **({"trials": spec.trials} if spec.trials else {}),  # only when set, as errors below
        "penalty": spec.penalty.record(),
        # only when set, so fits with the model's own standard errors keep their fingerprint
        **({"errors": {"cluster": spec.cluster} if spec.cluster else spec.errors} if spec.errors != "model" else {}),
        **({"folds": spec.folds} if spec.folds else {}),  # only when set, so fits without folds keep their fingerprint
        "threshold": spec.threshold,
        "max_dropped": spec.max_dropped,
        "expect": dict(sorted(spec.expect.items())),
        "step": dict(sorted(spec.step.items())),
        "notes": dict(sorted(spec.notes.items())),
        **({"groups": list(spec.groups)} if spec.groups else {}),  # only when set, so other fits keep their fingerprint
        "terms": {term.name: term.fingerprint for term in terms},
    }


@dataclass(frozen=True)
class CompiledProject:
    project: Project
    terms: dict[str, Term]
    models: dict[str, CompiledModel]
    warnings: tuple[Diagnostic, ...] = ()


def compile_project(project: Project) -> CompiledProject:
    """Run every pass; raise FeatpipeError with all problems of the project at once (those found while
    loading it included)."""
    diagnostics: list[Diagnostic] = list(project.problems)
    texts = {source.display: source.text for source in project.term_files}
    columns_by_input = {name: spec.columns for name, spec in project.inputs.items()}
    raw_terms = _parse_files(project, diagnostics)
    raw_terms = _unique_names(raw_terms, columns_by_input, diagnostics)
    raw_terms, calls, refused = _learned_calls(raw_terms, texts, diagnostics)
    raw_terms, uses, problems = resolve_names(raw_terms, columns_by_input, texts)
    _refuse_learned_uses(raw_terms, uses, calls, texts, problems)
    for term in raw_terms:
        problems.setdefault(term.name, []).extend(check_allowed(term.expression, term.file))
    broken = {name for name, found in problems.items() if found} | refused
    diagnostics.extend(d for found in problems.values() for d in found)

    order, cycles = dependency_order(uses)
    by_name = {term.name: term for term in raw_terms}
    for cycle in cycles:
        first = by_name[cycle[0]]
        diagnostics.append(Diagnostic(first.file, first.line, first.col,
                                      f"terms depend on each other in a cycle: {' -> '.join(cycle)}"))
        broken.update(cycle)

    terms = _typed_terms(project, raw_terms, uses, order, broken, texts, diagnostics, calls)
    models = {}
    for spec in project.models.values():
        model = _compile_model(project, spec, terms, uses, by_name, diagnostics)
        if model is not None:
            models[spec.name] = model
    raise_if_errors(diagnostics)
    warnings = tuple(d for d in diagnostics if d.severity != "error")
    return CompiledProject(project, terms, models, warnings)


def _parse_files(project: Project, diagnostics: list[Diagnostic]) -> list[RawTerm]:
    terms: list[RawTerm] = []
    for source in project.term_files:
        parsed = parse_term_file(source.display, source.text)
        diagnostics.extend(parsed.diagnostics)
        if parsed.input is not None and parsed.input not in project.inputs:
            hint = difflib.get_close_matches(parsed.input, list(project.inputs), n=1)
            advice = f"did you mean '{hint[0]}'?" if hint else f"declare it under 'inputs:' in {PROJECT_FILE}"
            line, col = parsed.input_position
            diagnostics.append(Diagnostic(source.display, line, col, f"unknown input '{parsed.input}'; {advice}"))
            continue
        terms.extend(parsed.terms)
    return terms


def _unique_names(terms: list[RawTerm], columns_by_input, diagnostics) -> list[RawTerm]:
    seen: dict[str, RawTerm] = {}
    kept = []
    for term in terms:
        if not NAME_PATTERN.match(term.name):
            diagnostics.append(Diagnostic(term.file, term.line, term.col,
                f"term name '{term.name}' must start with a letter and hold only letters, digits and _"))
            continue
        clash = reserved_reason(term.name)
        if clash:
            diagnostics.append(Diagnostic(term.file, term.line, term.col, f"term name '{term.name}' {clash}; choose another name"))
            continue
        if term.name.lower() in {column.lower() for column in columns_by_input.get(term.input, {})}:
            diagnostics.append(Diagnostic(term.file, term.line, term.col,
                f"term name '{term.name}' is already a column of input '{term.input}'; choose another name"))
            continue
        if term.name in seen:
            first = seen[term.name]
            diagnostics.append(Diagnostic(term.file, term.line, term.col,
                f"term '{term.name}' is already defined at {first.file}:{first.line}:{first.col}; names are unique across the project"))
            continue
        seen[term.name] = term
        kept.append(term)
    return kept


def _learned_calls(terms: list[RawTerm], texts, diagnostics) -> tuple[list[RawTerm], dict[str, LearnedCall], set[str]]:
    """Learned terms with their argument as expression (the other passes check it), their calls, and
    the terms refused here (kept with a NULL expression, so no pass reports them again)."""
    kept, calls, refused = [], {}, set()
    for term in terms:
        nested = nested_learned(term.expression)
        problems = [(nested, f"{nested.name.upper()}(...) must be the whole expression of a term: write it as its "
                             "own projection and do not use it inside another expression")] if nested else []
        call = None
        if not problems and is_learned(term.expression):
            call, problems = learned_call(term.expression)
        for node, message in problems:
            diagnostics.append(Diagnostic(term.file, *node_position(texts[term.file], node), message))
        if problems:
            refused.add(term.name)
            kept.append(dataclasses.replace(term, expression=exp.Null()))
        elif call is not None:
            calls[term.name] = call
            kept.append(dataclasses.replace(term, expression=term.expression.expressions[0]))
        else:
            kept.append(term)
    return kept, calls, refused


def _refuse_learned_uses(terms: list[RawTerm], uses, calls, texts, problems) -> None:
    """A learned term's constants are learned per model, so no other term may be built from it."""
    for term in terms:
        for used in sorted(uses[term.name] & set(calls)):
            node = next((c for c in term.expression.find_all(exp.Column) if c.name == used), term.expression)
            problems.setdefault(term.name, []).append(Diagnostic(term.file, *node_position(texts[term.file], node),
                f"term '{used}' is a learned term ({calls[used].function}); other terms may not use it: "
                "use its argument expression instead"))


def _typed_terms(project, raw_terms, uses, order, broken, texts, diagnostics, calls=None) -> dict[str, Term]:
    calls = calls or {}
    by_name = {term.name: term for term in raw_terms}
    kinds: dict[str, str] = {}
    for name in order:
        term = by_name[name]
        if name in broken or any(used in broken or used not in kinds for used in uses[name]):
            broken.add(name)
            continue
        schema = dict(project.inputs[term.input].columns)
        schema.update({used: "BOOLEAN" if kinds[used] == "boolean" else "DOUBLE" for used in uses[name]})
        if name in calls:
            kind, problems = argument_type(calls[name], term.expression, schema)
        else:
            kind, problems = term_type(term.expression, schema)
        for node, message in problems:
            line, col = node_position(texts[term.file], node)
            diagnostics.append(Diagnostic(term.file, line, col, message))
        if kind is None:
            broken.add(name)
            continue
        kinds[name] = kind

    typed = [name for name in order if name in kinds]
    expressions = {name: by_name[name].expression for name in typed}
    shapes = inlined_shape(expressions, typed)
    good: list[str] = []
    for name in typed:
        nodes, depth = shapes[name]
        if any(used in typed and used not in good for used in uses[name]):
            continue  # built from a term refused below: that term carries the message
        if depth > MAX_INLINED_DEPTH or nodes > MAX_INLINED_NODES:
            term = by_name[name]
            diagnostics.append(Diagnostic(term.file, term.line, term.col,
                f"term '{name}' grows to {nodes:,} parts nested {depth} deep once the terms it uses are written "
                f"out (at most {MAX_INLINED_NODES:,} parts, {MAX_INLINED_DEPTH} deep); build it from fewer or "
                "simpler terms"))
        else:
            good.append(name)
    inlined = inline_terms({name: expressions[name] for name in good}, good)
    terms = {}
    for name in good:
        raw, tree = by_name[name], canonical_tree(inlined[name])
        sql = canonical_sql(tree)
        if any(used in good and used not in terms for used in uses[name]):
            continue  # built from a term refused below
        nesting = nesting_depth(sql)
        if nesting > MAX_INLINED_NESTING:
            diagnostics.append(Diagnostic(raw.file, raw.line, raw.col,
                f"term '{name}' nests parentheses and CASE {nesting} deep once the terms it uses are written out "
                f"(at most {MAX_INLINED_NESTING}); build it from fewer or shallower terms"))
            continue
        terms[name] = Term(
            name=name, input=raw.input, file=raw.file, line=raw.line, col=raw.col, doc=raw.doc,
            kind=kinds[name], sql=sql,
            fingerprint=fingerprint_of_sql(call_sql(calls[name], tree) if name in calls else sql),
            uses=tuple(sorted(uses[name])), built_from=tuple(sorted(_closure(name, uses))),
            columns=tuple(sorted({c.name for c in tree.find_all(exp.Column)})),
            expression=raw.expression, inlined=tree, learned=calls.get(name),
        )
    return terms


def _closure(name: str, uses: dict[str, set[str]]) -> set[str]:
    found: set[str] = set()
    pending = list(uses.get(name, ()))
    while pending:
        used = pending.pop()
        if used not in found:
            found.add(used)
            pending.extend(uses.get(used, ()))
    return found


def column_term(project: Project, input_name: str, column: str) -> Term:
    """An input column listed directly as a model term."""
    reference = exp.column(exp.to_identifier(column, quoted=True))  # as declared, whatever its case
    tree = canonical_tree(reference)
    sql = canonical_sql(tree)
    declared = exp.DataType.build(project.inputs[input_name].columns[column], dialect=TERM_DIALECT)
    line, col = (project.document.key_positions.get(("inputs", input_name, "columns", column), (1, 1))
                 if project.document else (1, 1))
    return Term(
        name=column, input=input_name, file=PROJECT_FILE, line=line, col=col, doc="",
        kind="boolean" if declared.is_type(exp.DataType.Type.BOOLEAN) else "numeric",
        sql=sql, fingerprint=fingerprint_of_sql(sql), uses=(), built_from=(), columns=(column,),
        expression=reference, inlined=tree,
    )


def _compile_model(project, spec: ModelSpec, terms, uses, raw_by_name, diagnostics) -> CompiledModel | None:
    before = len([d for d in diagnostics if d.severity == "error"])
    columns = project.inputs[spec.input].columns
    chosen: list[Term] = []
    direct_columns = {name: {c.name for c in raw.expression.find_all(exp.Column)} for name, raw in raw_by_name.items()}
    for index, name in enumerate(spec.terms):
        where = ("terms", index)
        if name in terms:
            term = terms[name]
            if term.input != spec.input:
                diagnostics.append(spec.at(where, f"term '{name}' is computed over input '{term.input}', "
                                                  f"but this model reads '{spec.input}'"))
                continue
        elif name in columns:
            if name == spec.target:
                diagnostics.append(spec.at(where, f"'{name}' is the model's target; it cannot also be a term"))
                continue
            clash = reserved_reason(name)
            if clash:
                diagnostics.append(spec.at(where, f"column '{name}' {clash}, so it cannot be a term as it is; "
                                                  f"define a term with another name for it"))
                continue
            declared = exp.DataType.build(columns[name], dialect=TERM_DIALECT)
            if not declared.is_type(*exp.DataType.REAL_TYPES, *exp.DataType.INTEGER_TYPES, exp.DataType.Type.BOOLEAN):
                diagnostics.append(spec.at(where, f"column '{name}' is {columns[name]}; only numeric or boolean "
                                                  "columns can be terms: define an indicator term for it"))
                continue
            term = column_term(project, spec.input, name)
        elif name in raw_by_name:
            continue  # the term has its own error, reported in its file
        else:
            candidates = sorted(set(terms) | set(columns))
            hint = difflib.get_close_matches(name, candidates, n=1)
            advice = f"did you mean '{hint[0]}'?" if hint else "define it in a term file under terms/"
            diagnostics.append(spec.at(where, f"unknown term '{name}'; {advice}"))
            continue
        for path in target_paths(spec.target, term.name, uses, direct_columns) if term.name in raw_by_name else []:
            diagnostics.append(spec.at(where, f"leakage: term '{term.name}' reads the target '{spec.target}' ({path}); "
                                              "a term must be known before the outcome"))
        chosen.append(term)

    for index, group in enumerate(spec.groups):
        for term in chosen:
            if group in term.columns:
                diagnostics.append(spec.at(("groups", index), f"group column '{group}' is read by term '{term.name}' "
                                   f"({term.file}:{term.line}:{term.col}); a group is reported, never modelled: remove "
                                   "the term from the model or the column from groups"))
    offset_tree, offset_sql = None, None
    if spec.offset is not None:
        offset_tree = _compile_offset(spec, columns, diagnostics)
        offset_sql = canonical_sql(offset_tree) if offset_tree is not None else None
    if spec.weights is not None:
        declared = exp.DataType.build(columns[spec.weights], dialect=TERM_DIALECT)
        if not declared.is_type(*exp.DataType.REAL_TYPES, *exp.DataType.INTEGER_TYPES):
            diagnostics.append(spec.at(("weights",), f"weights column '{spec.weights}' must be numeric, not {columns[spec.weights]}"))
    if spec.trials is not None:
        declared = exp.DataType.build(columns[spec.trials], dialect=TERM_DIALECT)
        if not declared.is_type(*exp.DataType.REAL_TYPES, *exp.DataType.INTEGER_TYPES):
            diagnostics.append(spec.at(("trials",), f"trials column '{spec.trials}' must hold whole numbers, not {columns[spec.trials]}"))
    if len([d for d in diagnostics if d.severity == "error"]) > before:
        return None

    layout = DesignLayout(
        table=design_table_name(spec.name),
        key=project.inputs[spec.input].key,
        target=spec.target,
        terms=tuple(term.name for term in chosen),
        offset=OFFSET_COLUMN if offset_tree is not None else None,
        weight=WEIGHT_COLUMN if spec.weights or spec.trials else None,
        cluster=CLUSTER_COLUMN if spec.cluster else None,
    )
    return CompiledModel(spec, tuple(chosen), offset_tree, offset_sql, layout,
                         model_fingerprint(spec, layout.key, chosen, offset_sql))


def _compile_offset(spec: ModelSpec, columns: dict[str, str], diagnostics) -> exp.Expression | None:
    line, col = spec.document.value_positions.get(("offset",), (1, 1)) if spec.document else (1, 1)
    try:
        tree = sqlglot.parse_one(spec.offset, dialect=TERM_DIALECT)
    except (ParseError, TokenError) as failure:
        diagnostics.append(Diagnostic(spec.display, line, col, f"offset is not a SQL expression: {str(failure).splitlines()[0]}"))
        return None
    tree = with_declared_columns(normalize_identifiers(tree, dialect=TERM_DIALECT), spec.input, columns)
    problems = [Diagnostic(spec.display, line, col, f"offset: {d.message}") for d in check_allowed(tree, spec.display)]
    for reference in tree.find_all(exp.Column):
        if reference.name not in columns:
            hint = difflib.get_close_matches(reference.name, list(columns), n=1)
            advice = f"; did you mean '{hint[0]}'?" if hint else ""
            problems.append(Diagnostic(spec.display, line, col, f"offset uses '{reference.name}', which is not a column of input '{spec.input}'{advice}"))
        elif reference.name == spec.target:
            problems.append(Diagnostic(spec.display, line, col, "leakage: the offset reads the target"))
    if not problems:
        kind, type_problems = term_type(tree, columns)
        problems += [Diagnostic(spec.display, line, col, f"offset: {message}") for _, message in type_problems]
        if kind == "boolean":
            problems.append(Diagnostic(spec.display, line, col, "offset must be numeric, e.g. LN(exposure_years)"))
    diagnostics.extend(problems)
    return None if problems else canonical_tree(tree)


def model_fingerprint(spec: ModelSpec, key: str, terms: Sequence[Term], offset_sql: str | None) -> str:
    """Hash of what a fit depends on (`fit_dependencies`): a change of any of it makes a fit stale."""
    return dependencies_fingerprint(fit_dependencies(spec, key, terms, offset_sql))


def dependencies_fingerprint(dependencies: dict[str, object]) -> str:
    """Hash of a `fit_dependencies` mapping; a fitted file's `depends_on` hashes to its model fingerprint.

    Keys are hashed in their fixed order, so listing the same terms in another order is a change too.
    """
    return hashlib.sha256(json.dumps(dependencies).encode()).hexdigest()[:16]
