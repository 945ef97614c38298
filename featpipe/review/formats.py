"""`featpipe diff` for people: terminal text, and Markdown to post as a review comment.

Both renderers say the same things in the same order (terms, models, stale fits, fitted files);
`ProjectDiff.as_dict()` is the machine form.
"""

from __future__ import annotations

from collections.abc import Callable

from .diff import (
    CoefficientChange,
    Estimate,
    FitChange,
    ModelChange,
    ProjectDiff,
    StaleFit,
    ValueChange,
)

Quote = Callable[[str], str]

ASPECT_WORDS = {"whitespace": "layout", "comment": "inline comments", "wording": "wording", "doc": "doc"}
FIT_WORDS = {"added": "new fit", "removed": "deleted", "changed": "refitted", "unreadable": "could not be read"}
TERM_WORDS = {"meaning": "meaning changed", "removed": "removed", "added": "added", "renamed": "renamed",
              "text": "text changed"}


def number(value) -> str:
    if value is None:
        return "n/a"
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return str(value)
    return str(value) if isinstance(value, int) else f"{value:.5g}"


def estimate(value: Estimate | None) -> str:
    if value is None:
        return "(not in fit)"
    if value.ci_low is None and value.ci_high is None:
        return number(value.estimate)
    return f"{number(value.estimate)} [{number(value.ci_low)}, {number(value.ci_high)}]"


def coefficient_notes(change: CoefficientChange) -> list[str]:
    notes = []
    if change.sign_flipped:
        notes.append("sign flipped")
    if change.outside_old_interval:
        notes.append("outside the old 95% interval")
    if change.redefined:
        notes.append("term redefined")
    return notes


def _plain(text: str) -> str:
    return text


def _code(text: str) -> str:
    fence = "``" if "`" in text else "`"
    padding = " " if fence == "``" else ""
    return f"{fence}{padding}{text}{padding}{fence}"


def _names(names, quote: Quote) -> str:
    return ", ".join(quote(name) for name in names)


def _in_models(models, quote: Quote, was: bool = False) -> str:
    if not models:
        return "was in no model" if was else "in no model"
    return f"{'was in' if was else 'in'} models: {_names(models, quote)}"


def term_label(change, quote: Quote) -> str:
    if change.change == "renamed":
        return f"{quote(change.old_name)} -> {quote(change.name)}"
    return quote(change.name)


def term_where(change, short: str) -> str:
    return f"{change.file}:{change.line}" + (f" (at {short})" if change.change == "removed" else "")


def term_detail(change, quote: Quote) -> str:
    """One phrase: how the term changed and which models it goes into."""
    if change.change == "meaning":
        how = []
        if change.direct:
            how.append("directly")
        if change.through:
            how.append(f"through {_names(change.through, quote)}")
        return f"changed {' and '.join(how) or 'through a name it uses'}; {_in_models(change.models, quote)}"
    if change.change == "text":
        edits = [ASPECT_WORDS[aspect] for aspect in change.aspects if aspect in ASPECT_WORDS]
        parts = [f"{' and '.join(edits)} changed"] if edits else []
        if "file" in change.aspects:
            parts.append(f"moved from {change.old_file}")
        return f"same meaning; {', '.join(parts)}; {_in_models(change.models, quote)}"
    if change.change == "renamed":
        return f"same meaning; {_in_models(change.models, quote)}"
    return _in_models(change.models, quote, was=change.change == "removed")


def model_detail(change: ModelChange, quote: Quote) -> str:
    if change.change != "changed":
        return change.change
    parts = []
    for label, names in (("terms added", change.terms_added), ("terms removed", change.terms_removed),
                         ("terms changed meaning", change.terms_changed), ("spec changed", change.spec_changed)):
        if names:
            parts.append(f"{label}: {_names(names, quote)}")
    return "; ".join(parts)


def stale_detail(fit: StaleFit, short: str) -> str:
    whose = "left stale by this change" if fit.caused_by_change else f"already stale at {short}"
    return f"{'; '.join(fit.reasons)}; {whose}"


def value_lines(fit: FitChange) -> list[tuple[str, ValueChange | str]]:
    """(section.path, change) for scalar values, and one summary per list (calibration tables)."""
    lines: list[tuple[str, ValueChange | str]] = []
    for section in ("rows", "fit", "metrics"):
        listed: dict[str, int] = {}
        for change in getattr(fit, section):
            if "[" in change.path:
                head = change.path.split("[")[0]
                listed[head] = listed.get(head, 0) + 1
            else:
                lines.append((f"{section}.{change.path}", change))
        lines += [(f"{section}.{head}", f"{count} value{'s' if count != 1 else ''} changed (see --json)")
                  for head, count in listed.items()]
    return lines


def value_change(change: ValueChange) -> str:
    delta = f" ({change.delta:+.5g})" if change.delta is not None else ""
    return f"{number(change.old)} -> {number(change.new)}{delta}"


def stale_footer(diff: ProjectDiff) -> str | None:
    if not diff.left_stale:
        return None
    count = len(diff.left_stale)
    names = ", ".join(fit.model for fit in diff.left_stale)
    return (f"{count} fitted model{'s' if count != 1 else ''} left stale by this change ({names}): "
            "run `featpipe fit` and commit the fitted files")


def render_text(diff: ProjectDiff) -> str:
    short = diff.since.short
    lines = [f"featpipe diff: project {diff.project}, working tree against {diff.since.label} ({short})"]
    if diff.unchanged:
        lines.append("no change in terms, models or fitted files")
    if diff.terms or diff.edited_files:
        lines += ["", "Terms"]
        for change in diff.terms:
            lines.append(f"  {TERM_WORDS[change.change]}  {term_label(change, _plain)}  "
                         f"{term_where(change, short)}  {term_detail(change, _plain)}")
            if change.change == "meaning":
                lines += [f"      before  {change.old_sql}", f"      now     {change.new_sql}"]
        lines += [f"  file edited  {path}  no term changed" for path in diff.edited_files]
    if diff.models:
        lines += ["", "Models"] + [f"  {change.name}  {model_detail(change, _plain)}" for change in diff.models]
    if diff.stale:
        lines += ["", "Stale fits"] + [f"  {fit.file}  {stale_detail(fit, short)}" for fit in diff.stale]
    if diff.fitted:
        lines += ["", "Fitted files"]
        for fit in diff.fitted:
            lines.append(f"  {fit.file}  {FIT_WORDS[fit.change]}" + (f": {fit.problem}" if fit.problem else ""))
            width = max((len(change.name) for change in fit.coefficients), default=0)
            for change in fit.coefficients:
                notes = coefficient_notes(change)
                lines.append(f"    {change.name:<{width}}  {estimate(change.old)} -> {estimate(change.new)}"
                             + (f"  {'; '.join(notes)}" if notes else ""))
            for path, change in value_lines(fit):
                lines.append(f"    {path}: {change if isinstance(change, str) else value_change(change)}")
            lines += [f"    learned {change.term}: {'; '.join(change.changes)}" for change in fit.learned]
    footer = stale_footer(diff)
    if footer:
        lines += ["", footer]
    return "\n".join(lines) + "\n"


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", "<br>")


def _row(*cells: str) -> str:
    return "| " + " | ".join(_cell(cell) for cell in cells) + " |"


def render_markdown(diff: ProjectDiff) -> str:
    short = diff.since.short
    lines = [f"### featpipe diff: {_code(diff.project)}", "",
             f"Working tree against {diff.since.label} ({_code(short)})."]
    if diff.unchanged:
        lines += ["", "No change in terms, models or fitted files."]
    footer = stale_footer(diff)
    if footer:
        lines += ["", f"**{footer}**"]
    if diff.terms or diff.edited_files:
        lines += ["", "#### Terms", "", _row("change", "term", "where", "detail"), _row(*["---"] * 4)]
        for change in diff.terms:
            lines.append(_row(TERM_WORDS[change.change], term_label(change, _code),
                              _code(term_where(change, short)), term_detail(change, _code)))
        lines += [_row("file edited", "", _code(path), "no term changed") for path in diff.edited_files]
        redefined = [change for change in diff.terms if change.change == "meaning"]
        if redefined:
            lines += ["", "Meaning changes, canonical SQL side by side:", "",
                      _row("term", f"before ({_code(short)})", "now"), _row(*["---"] * 3)]
            lines += [_row(_code(change.name), _code(change.old_sql), _code(change.new_sql)) for change in redefined]
    if diff.models:
        lines += ["", "#### Models", ""]
        lines += [f"- {_code(change.name)}: {model_detail(change, _code)}" for change in diff.models]
    if diff.stale:
        lines += ["", "#### Stale fits", ""]
        lines += [f"- {_code(fit.file)}: {stale_detail(fit, short)}" for fit in diff.stale]
    if diff.fitted:
        lines += ["", "#### Fitted files"]
        for fit in diff.fitted:
            lines += ["", f"{_code(fit.file)}: {FIT_WORDS[fit.change]}" + (f": {fit.problem}" if fit.problem else "")]
            if fit.coefficients:
                lines += ["", _row("coefficient", "before [95% interval]", "now [95% interval]", "note"), _row(*["---"] * 4)]
                for change in fit.coefficients:
                    notes = ", ".join(f"**{note}**" for note in coefficient_notes(change))
                    lines.append(_row(_code(change.name), estimate(change.old), estimate(change.new), notes))
            if fit.learned:
                lines += ["", "Learned constants that moved:", ""]
                lines += [f"- {_code(change.term)}: {'; '.join(change.changes)}" for change in fit.learned]
            values = value_lines(fit)
            if values:
                lines += ["", _row("value", "before", "now", "change"), _row(*["---"] * 4)]
                for path, change in values:
                    if isinstance(change, str):
                        lines.append(_row(_code(path), "", "", change))
                    else:
                        delta = f"{change.delta:+.5g}" if change.delta is not None else ""
                        lines.append(_row(_code(path), number(change.old), number(change.new), delta))
    return "\n".join(lines) + "\n"
