"""What changed between a git revision and the working tree: in term meaning, in models, in fits.

`compare_projects` is a pure function over two compiled projects and the text of their fitted
files; `diff_project` reads both sides (the revision through git, see revision.py) and calls it.

- A term is *renamed* when a removed and an added term have the same fingerprint.
- A term whose fingerprint is unchanged but whose written text, doc or file changed has a *text*
  change: its meaning, and so every fit using it, is untouched.
- A term whose fingerprint changed has a *meaning* change, *directly* (its own expression as
  written means something else) and/or *through* the terms it is built from that changed.

    >>> change = diff_project("projects/lease_default", since="main")   # doctest: +SKIP
    >>> [term.name for term in change.terms if term.change == "meaning"]  # doctest: +SKIP
"""

from __future__ import annotations

import json
import tempfile
from dataclasses import asdict, dataclass
from functools import lru_cache
from pathlib import Path, PurePosixPath
from typing import ClassVar

import sqlglot
from sqlglot.errors import TokenError
from sqlglot.tokens import Token, TokenType

from ..compiler import CompiledModel, CompiledProject, Term, compile_project
from ..compiler.canonical import canonical_sql
from ..compiler.parse import TERM_DIALECT
from ..errors import FeatpipeError
from ..fitted import FittedModel, from_yaml, staleness
from ..fitted.learned import constants_changes
from ..project import load_project
from .revision import Revision, project_files_at, resolve_revision, write_project_files


@dataclass(frozen=True)
class TermAdded:
    change: ClassVar[str] = "added"
    name: str
    file: str
    line: int
    sql: str
    fingerprint: str
    models: tuple[str, ...]


@dataclass(frozen=True)
class TermRemoved:
    change: ClassVar[str] = "removed"
    name: str
    file: str  # where it was at the revision
    line: int
    sql: str
    fingerprint: str
    models: tuple[str, ...]  # models that used it at the revision


@dataclass(frozen=True)
class TermRenamed:
    change: ClassVar[str] = "renamed"
    old_name: str
    name: str
    old_file: str
    old_line: int
    file: str
    line: int
    fingerprint: str
    models: tuple[str, ...]  # models that use the new name


@dataclass(frozen=True)
class TermTextChanged:
    """Same fingerprint, different text: `aspects` says what differs, of whitespace (layout only),
    comment (comments inside the expression), wording (case, quoting, parentheses: same meaning),
    doc (the comment lines above the term) and file (moved to another term file)."""

    change: ClassVar[str] = "text"
    name: str
    file: str
    line: int
    aspects: tuple[str, ...]
    old_file: str
    old_line: int
    old_text: str
    new_text: str
    old_doc: str
    new_doc: str
    models: tuple[str, ...]


@dataclass(frozen=True)
class TermMeaningChanged:
    change: ClassVar[str] = "meaning"
    name: str
    file: str
    line: int
    direct: bool  # its own expression, as written, changed meaning
    through: tuple[str, ...]  # terms it is built from that were edited, added or removed
    old_sql: str  # canonical, fully inlined
    new_sql: str
    old_fingerprint: str
    new_fingerprint: str
    models: tuple[str, ...]


TermChange = TermAdded | TermRemoved | TermRenamed | TermTextChanged | TermMeaningChanged
TERM_CHANGE_ORDER = ("meaning", "removed", "added", "renamed", "text")


@dataclass(frozen=True)
class ModelChange:
    name: str
    change: str  # "added", "removed" or "changed"
    terms_added: tuple[str, ...] = ()
    terms_removed: tuple[str, ...] = ()
    terms_changed: tuple[str, ...] = ()  # listed on both sides, meaning changed
    spec_changed: tuple[str, ...] = ()  # spec fields a fit depends on that changed (compiler.fit_dependencies)


@dataclass(frozen=True)
class StaleFit:
    model: str
    file: str
    reasons: tuple[str, ...]
    caused_by_change: bool  # the model's definition or its fitted file changed since the revision


@dataclass(frozen=True)
class Estimate:
    estimate: float
    std_error: float | None
    ci_low: float | None
    ci_high: float | None
    p_value: float | None


@dataclass(frozen=True)
class CoefficientChange:
    name: str
    old: Estimate | None  # None: the term was not in the old fit
    new: Estimate | None
    sign_flipped: bool
    outside_old_interval: bool  # the new estimate lies outside the old 95% interval
    redefined: bool  # the term's fingerprint differs between the two fits


@dataclass(frozen=True)
class ValueChange:
    """One scalar leaf of `rows`, `fit` or `metrics`: `calibration[3].mean_observed`, `dropped.null term x`."""

    path: str
    old: object
    new: object
    delta: float | None  # new - old when both are numbers


@dataclass(frozen=True)
class LearnedChange:
    """A learned term's constants that moved between the two fits: levels added or dropped, the
    reference, edges, knots or caps (fitted.learned.constants_changes)."""

    term: str
    changes: tuple[str, ...]


@dataclass(frozen=True)
class FitChange:
    model: str
    file: str
    change: str  # "added", "removed", "changed" or "unreadable"
    problem: str | None = None  # why a side could not be read
    coefficients: tuple[CoefficientChange, ...] = ()
    rows: tuple[ValueChange, ...] = ()
    fit: tuple[ValueChange, ...] = ()
    metrics: tuple[ValueChange, ...] = ()
    learned: tuple[LearnedChange, ...] = ()  # learned terms whose constants moved


@dataclass(frozen=True)
class ProjectDiff:
    project: str
    since: Revision
    terms: tuple[TermChange, ...]
    edited_files: tuple[str, ...]  # term files edited without changing any term (file comments, blank lines)
    models: tuple[ModelChange, ...]
    stale: tuple[StaleFit, ...]  # every fitted file that no longer matches its model
    fitted: tuple[FitChange, ...]  # fitted files that differ from the revision's

    @property
    def left_stale(self) -> tuple[StaleFit, ...]:
        """Stale fits this change is responsible for: what `--fail-on-stale` fails on."""
        return tuple(fit for fit in self.stale if fit.caused_by_change)

    @property
    def unchanged(self) -> bool:
        """Nothing differs from the revision (stale fits may still predate it)."""
        return not (self.terms or self.edited_files or self.models or self.fitted)

    def as_dict(self) -> dict:
        """Plain JSON types only, the shape `featpipe diff --json` prints."""
        value = {
            "project": self.project,
            "since": {"rev": self.since.label, "commit": self.since.commit},
            "terms": [{"change": term.change, **asdict(term)} for term in self.terms],
            "edited_files": self.edited_files,
            "models": [asdict(model) for model in self.models],
            "stale": [asdict(fit) for fit in self.stale],
            "left_stale": [fit.model for fit in self.left_stale],
            "fitted": [asdict(fit) for fit in self.fitted],
        }
        return json.loads(json.dumps(value))


def diff_project(project_path: Path | str | None = None, since: str | None = None) -> ProjectDiff:
    """Compare the project in the working tree with the same folder at git revision `since`
    (default: the merge base with the default branch, else HEAD). Reads only; changes no file."""
    project = load_project(project_path)
    compiled = compile_project(project)
    revision = resolve_revision(project.root, since)
    files = project_files_at(revision)
    old, old_fitted = None, {}
    if files is not None:
        old_fitted = {PurePosixPath(path).stem: text for path, text in files.items() if path.startswith("fitted/")}
        definitions = {path: text for path, text in files.items() if not path.startswith("fitted/")}
        old = _compile_at(revision, definitions, project.root.name)
    new_fitted = {path.stem: path.read_text(encoding="utf-8")
                  for path in sorted((project.root / "fitted").glob("*.yaml"))}
    return compare_projects(old, compiled, old_fitted, new_fitted, revision)


def _compile_at(revision: Revision, files: dict[str, str], folder_name: str) -> CompiledProject:
    where = f"{revision.short}:{revision.prefix + '/' if revision.prefix else ''}"
    with tempfile.TemporaryDirectory(prefix="featpipe-diff-") as folder:
        root = Path(folder) / folder_name
        write_project_files(files, root)
        try:
            return compile_project(load_project(root))
        except FeatpipeError as error:
            problems = [f"  {where}{diagnostic}" for diagnostic in error.diagnostics]
            detail = "\n".join(problems) if problems else "  " + str(error).replace(f"{root}/", where).replace(str(root), where)
            raise FeatpipeError(
                f"the project at {revision.label} ({revision.short}) does not load, so there is nothing to compare "
                f"with; pass --since a revision where `featpipe check` passed:\n{detail}"
            ) from None


def compare_projects(
    old: CompiledProject | None,
    new: CompiledProject,
    old_fitted: dict[str, str],
    new_fitted: dict[str, str],
    since: Revision,
) -> ProjectDiff:
    """The change from `old` (None: the project did not exist yet) to `new`; fitted files are given
    as text by model name."""
    old_terms = old.terms if old else {}
    old_models = old.models if old else {}
    old_texts = {source.display: source.text for source in old.project.term_files} if old else {}
    new_texts = {source.display: source.text for source in new.project.term_files}

    terms = _term_changes(old_terms, new.terms, old_models, new.models, old_texts, new_texts)
    models = _model_changes(old_models, new.models)
    touched_files = {change.file for change in terms} | {getattr(change, "old_file", change.file) for change in terms}
    edited = tuple(sorted(path for path, text in new_texts.items()
                          if path in old_texts and old_texts[path] != text and path not in touched_files))
    fingerprint_moved = {name for name in new.models if name not in old_models
                         or old_models[name].fingerprint != new.models[name].fingerprint}
    stale = _stale_fits(new.models, old_fitted, new_fitted, fingerprint_moved | (set(old_models) - set(new.models)),
                        new.project.inputs)
    fitted = tuple(_fit_change(name, old_fitted.get(name), new_fitted.get(name))
                   for name in sorted(set(old_fitted) | set(new_fitted))
                   if old_fitted.get(name) != new_fitted.get(name))
    return ProjectDiff(new.project.name, since, terms, edited, models, stale, fitted)


def models_using(models: dict[str, CompiledModel], name: str) -> tuple[str, ...]:
    """Models that list the term, or a term built from it."""
    return tuple(sorted(model.name for model in models.values()
                        if any(term.name == name or name in term.built_from for term in model.terms)))


def _term_changes(old_terms, new_terms, old_models, new_models, old_texts, new_texts) -> tuple[TermChange, ...]:
    changes: list[TermChange] = []
    removed = sorted(set(old_terms) - set(new_terms))
    added = sorted(set(new_terms) - set(old_terms))
    for old_name in list(removed):
        match = next((name for name in added if new_terms[name].fingerprint == old_terms[old_name].fingerprint), None)
        if match is None:
            continue
        before, after = old_terms[old_name], new_terms[match]
        changes.append(TermRenamed(old_name, match, before.file, before.line, after.file, after.line,
                                   after.fingerprint, models_using(new_models, match)))
        removed.remove(old_name)
        added.remove(match)
    changes += [TermRemoved(name, old_terms[name].file, old_terms[name].line, old_terms[name].sql,
                            old_terms[name].fingerprint, models_using(old_models, name)) for name in removed]
    changes += [TermAdded(name, new_terms[name].file, new_terms[name].line, new_terms[name].sql,
                          new_terms[name].fingerprint, models_using(new_models, name)) for name in added]

    kept = sorted(set(old_terms) & set(new_terms))
    redefined = [name for name in kept if old_terms[name].fingerprint != new_terms[name].fingerprint]
    edited = {name for name in redefined if _edited(old_terms[name], new_terms[name])}
    appeared_or_gone = set(old_terms) ^ set(new_terms)
    for name in redefined:
        before, after = old_terms[name], new_terms[name]
        through = sorted(used for used in set(before.built_from) | set(after.built_from)
                         if used in edited or used in appeared_or_gone)
        changes.append(TermMeaningChanged(name, after.file, after.line, name in edited, tuple(through),
                                          before.sql, after.sql, before.fingerprint, after.fingerprint,
                                          models_using(new_models, name)))
    for name in kept:
        before, after = old_terms[name], new_terms[name]
        if before.fingerprint != after.fingerprint:
            continue
        old_form = written_form(old_texts.get(before.file, ""), before.line, before.col)
        new_form = written_form(new_texts.get(after.file, ""), after.line, after.col)
        aspects = _text_aspects(before, after, old_form, new_form)
        if aspects:
            changes.append(TermTextChanged(
                name, after.file, after.line, aspects, before.file, before.line,
                old_form.text if old_form else "", new_form.text if new_form else "",
                before.doc, after.doc, models_using(new_models, name)))
    return tuple(sorted(changes, key=lambda change: (TERM_CHANGE_ORDER.index(change.change), change.name)))


def _edited(before: Term, after: Term) -> bool:
    """The term's own expression, as written (other terms still named), changed meaning."""
    return canonical_sql(before.expression) != canonical_sql(after.expression)


@dataclass(frozen=True)
class WrittenForm:
    text: str  # the projection's source, from its first token through its name
    tokens: tuple[tuple[str, str], ...]  # (token type, text): the SQL without layout or comments
    comments: tuple[str, ...]  # comments inside the projection; the doc above it is compared apart


def written_form(source: str, line: int, col: int) -> WrittenForm | None:
    """The projection whose name starts at `line`:`col` of a term file, as the author wrote it.

    >>> written_form("SELECT\\n  a  +  b AS s,\\n  c AS t\\nFROM x", 2, 14).text
    'a  +  b AS s'
    """
    tokens = _tokens(source)
    if tokens is None:
        return None
    lines = source.split("\n")
    offset = sum(len(text) + 1 for text in lines[: line - 1]) + col - 1
    name_index = next((index for index, token in enumerate(tokens) if token.start <= offset <= token.end), None)
    if name_index is None:
        return None
    first, depth = 0, 0
    for index in range(name_index - 1, -1, -1):
        kind = tokens[index].token_type
        if kind in (TokenType.R_PAREN, TokenType.R_BRACKET):
            depth += 1
        elif kind in (TokenType.L_PAREN, TokenType.L_BRACKET):
            depth -= 1
        elif depth == 0 and kind in (TokenType.COMMA, TokenType.SELECT):
            first = index + 1
            break
    span = tokens[first: name_index + 1]
    return WrittenForm(
        text=source[span[0].start: span[-1].end + 1],
        tokens=tuple((token.token_type.name, token.text) for token in span),
        comments=tuple(comment for token in span[1:] for comment in token.comments),
    )


@lru_cache(maxsize=64)
def _tokens(source: str) -> tuple[Token, ...] | None:
    """A term file's tokens, read once per file however many terms it holds."""
    try:
        return tuple(sqlglot.Dialect.get_or_raise(TERM_DIALECT).tokenize(source))
    except TokenError:
        return None


def _text_aspects(before: Term, after: Term, old: WrittenForm | None, new: WrittenForm | None) -> tuple[str, ...]:
    aspects = []
    if old is not None and new is not None:
        if old.tokens != new.tokens:
            aspects.append("wording")
        elif old.comments != new.comments:
            aspects.append("comment")
        elif old.text != new.text:
            aspects.append("whitespace")
    if before.doc != after.doc:
        aspects.append("doc")
    if before.file != after.file:
        aspects.append("file")
    return tuple(aspects)


def _model_changes(old_models: dict[str, CompiledModel], new_models: dict[str, CompiledModel]) -> tuple[ModelChange, ...]:
    changes = []
    for name in sorted(set(old_models) | set(new_models)):
        before, after = old_models.get(name), new_models.get(name)
        if before is None or after is None:
            changes.append(ModelChange(name, "added" if before is None else "removed"))
            continue
        old_spec, new_spec = before.dependencies, after.dependencies
        old_prints, new_prints = old_spec.pop("terms"), new_spec.pop("terms")
        change = ModelChange(
            name, "changed",
            terms_added=tuple(term for term in new_prints if term not in old_prints),
            terms_removed=tuple(term for term in old_prints if term not in new_prints),
            terms_changed=tuple(term for term in new_prints if term in old_prints and old_prints[term] != new_prints[term]),
            spec_changed=tuple(field for field, value in new_spec.items() if old_spec[field] != value),
        )
        if change.terms_added or change.terms_removed or change.terms_changed or change.spec_changed:
            changes.append(change)
    return tuple(changes)


def _stale_fits(models: dict[str, CompiledModel], old_fitted: dict[str, str], new_fitted: dict[str, str],
                moved: set[str], inputs) -> tuple[StaleFit, ...]:
    """Fitted files present now that no longer match their model. A stale fit is this change's
    doing when the model's fingerprint moved (or the model went away) or the fitted file changed."""
    stale = []
    for name, text in sorted(new_fitted.items()):
        file = f"fitted/{name}.yaml"
        try:
            reasons = staleness(from_yaml(text, file), models.get(name), inputs)
        except FeatpipeError as error:  # its fit change says `unreadable`; no fit can be current through it
            reasons = [f"it cannot be read ({error})"]
        if reasons:
            stale.append(StaleFit(name, file, tuple(reasons), name in moved or old_fitted.get(name) != text))
    return tuple(stale)


def _fit_change(name: str, old_text: str | None, new_text: str | None) -> FitChange:
    file = f"fitted/{name}.yaml"
    try:
        before = from_yaml(old_text, f"{file} at the revision") if old_text is not None else None
        after = from_yaml(new_text, file) if new_text is not None else None
    except FeatpipeError as error:
        return FitChange(name, file, "unreadable", problem=str(error))
    if after is None:
        return FitChange(name, file, "removed")
    return FitChange(
        name, file, "added" if before is None else "changed",
        coefficients=_coefficient_changes(before, after),
        rows=value_changes(before.rows if before else {}, after.rows),
        fit=value_changes(before.fit if before else {}, after.fit),
        metrics=value_changes(before.metrics if before else {}, after.metrics),
        learned=_learned_changes(before, after),
    )


def _learned_changes(before: FittedModel | None, after: FittedModel) -> tuple[LearnedChange, ...]:
    old_terms = {term.name: term for term in before.terms} if before else {}
    changes = []
    for term in after.model_terms:
        old = old_terms.get(term.name)
        if term.learned and old is not None:
            moved = constants_changes(old.learned, term.learned)
            if moved:
                changes.append(LearnedChange(term.name, tuple(moved)))
    return tuple(changes)


def _coefficients(fitted: FittedModel) -> dict[str, tuple[Estimate, str | None]]:
    """Every coefficient by name with its term's fingerprint: a learned term of several columns gives
    one per column, named 'term label'."""
    found = {}
    for term in fitted.terms:
        if term.estimate is None and term.learned:
            for item in term.learned["columns"]:
                found[f"{term.name} {item['label']}"] = (
                    Estimate(item["estimate"], item["std_error"], item["ci_low"], item["ci_high"], item["p_value"]),
                    term.fingerprint)
        else:
            found[term.name] = (Estimate(term.estimate, term.std_error, term.ci_low, term.ci_high, term.p_value),
                                term.fingerprint)
    return found


def _coefficient_changes(before: FittedModel | None, after: FittedModel) -> tuple[CoefficientChange, ...]:
    old_terms = _coefficients(before) if before else {}
    new_terms = _coefficients(after)
    names = list(new_terms) + [name for name in old_terms if name not in new_terms]
    changes = []
    for name in names:
        (old, old_fingerprint), (new, new_fingerprint) = old_terms.get(name, (None, None)), new_terms.get(name, (None, None))
        both = old is not None and new is not None
        changes.append(CoefficientChange(
            name, old, new,
            sign_flipped=both and old.estimate * new.estimate < 0,
            outside_old_interval=both and old.ci_low is not None and old.ci_high is not None
            and not old.ci_low <= new.estimate <= old.ci_high,
            redefined=both and old_fingerprint != new_fingerprint,
        ))
    return tuple(changes)


def scalar_leaves(value, path: str = "") -> dict[str, object]:
    """Every scalar inside nested dicts and lists, by path: {"dropped.null term x": 3, "calibration[0].rows": 10}."""
    if isinstance(value, dict):
        leaves = {}
        for key, item in value.items():
            leaves.update(scalar_leaves(item, f"{path}.{key}" if path else str(key)))
        return leaves
    if isinstance(value, (list, tuple)):
        leaves = {}
        for index, item in enumerate(value):
            leaves.update(scalar_leaves(item, f"{path}[{index}]"))
        return leaves
    return {path: value}


def _number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def value_changes(before: dict, after: dict) -> tuple[ValueChange, ...]:
    old, new = scalar_leaves(before), scalar_leaves(after)
    paths = list(new) + [path for path in old if path not in new]
    changes = []
    for path in paths:
        was, now = old.get(path), new.get(path)
        if was != now:
            delta = now - was if _number(was) and _number(now) else None
            changes.append(ValueChange(path, was, now, delta))
    return tuple(changes)
