"""Parse a term file into its terms: one `SELECT expr AS name, ... FROM input`.

Example:
    >>> parsed = parse_term_file("terms/a.sql", "SELECT\\n  -- Share of revenue.\\n  p / r AS ratio\\nFROM leases")
    >>> [(t.name, t.doc, t.line) for t in parsed.terms], parsed.input
    ([('ratio', 'Share of revenue.', 3)], 'leases')
"""

from __future__ import annotations

from dataclasses import dataclass, field

import sqlglot
from sqlglot import exp
from sqlglot.errors import ParseError, TokenError
from sqlglot.optimizer.normalize_identifiers import normalize_identifiers
from sqlglot.tokens import Token, TokenType

from ..errors import Diagnostic

TERM_DIALECT = "duckdb"  # term files are read as DuckDB SQL; the allow-list keeps them portable

# Limits on one term, so that every pass (and sqlglot's recursive parser and generator) stays far from
# Python's recursion limit: parentheses and CASE nested in one another, and the tokens of one term
# (names, numbers, operators, keywords; 500 allow a sum of 250 columns).
MAX_NESTING_DEPTH = 20
MAX_TERM_TOKENS = 500
_OPENING = {TokenType.L_PAREN, TokenType.L_BRACKET, TokenType.L_BRACE, TokenType.CASE}
_CLOSING = {TokenType.R_PAREN, TokenType.R_BRACKET, TokenType.R_BRACE, TokenType.END}
CLAUSES_NOT_ALLOWED = {
    "joins": "a term file reads one input row at a time; joins are not allowed",
    "where": "a term file may not filter rows (WHERE); a term is computed for every row",
    "group": "a term file may not aggregate rows (GROUP BY)",
    "having": "a term file may not aggregate rows (HAVING)",
    "qualify": "a term file may not use QUALIFY",
    "order": "a term file may not order rows (ORDER BY)",
    "limit": "a term file may not limit rows (LIMIT)",
    "offset": "a term file may not skip rows (OFFSET)",
    "distinct": "a term file may not use DISTINCT",
    "with_": "a term file may not define common table expressions (WITH)",
    "windows": "a term file may not define windows",
    "sample": "a term file may not sample rows (TABLESAMPLE, USING SAMPLE); a term is computed for every row",
    "pivots": "a term file may not PIVOT or UNPIVOT its input; a term reads the input row as it is",
    "laterals": "a term file reads one input row at a time; LATERAL is not allowed",
}
# What a term file's SELECT and its FROM <input> may hold besides the clauses above.
SELECT_PARTS = {"expressions", "from_"}
INPUT_PARTS = {"this", "alias"}


@dataclass(frozen=True)
class RawTerm:
    """A term as written: its expression may still name other terms."""

    name: str
    input: str
    file: str
    line: int
    col: int
    doc: str
    expression: exp.Expression = field(compare=False)


@dataclass
class ParsedFile:
    file: str
    input: str | None
    input_position: tuple[int, int]
    doc: str
    terms: list[RawTerm]
    diagnostics: list[Diagnostic]


def source_position(text: str, offset: int) -> tuple[int, int]:
    """1-based line and column of character `offset` in `text`."""
    line = text.count("\n", 0, offset) + 1
    col = offset - (text.rfind("\n", 0, offset) + 1) + 1
    return line, col


def node_position(text: str, node: exp.Expression) -> tuple[int, int]:
    """Where `node` starts in the file: the earliest positioned token inside it."""
    starts = [n.meta["start"] for n in node.walk() if "start" in n.meta]
    return source_position(text, min(starts)) if starts else (1, 1)


def parse_term_file(file: str, text: str) -> ParsedFile:
    """Split a term file into RawTerms, reporting every structural problem with its position."""
    parsed = ParsedFile(file, None, (1, 1), "", [], [])

    def error(line: int, col: int, message: str) -> ParsedFile:
        parsed.diagnostics.append(Diagnostic(file, line, col, message))
        return parsed

    dialect = sqlglot.Dialect.get_or_raise(TERM_DIALECT)
    tokens: list[Token] = []
    try:
        tokens = dialect.tokenize(text)
        too_deep = _first_too_deep(tokens)
        if too_deep is not None:  # before parsing: sqlglot's parser recurses about 20 calls per level
            return error(*source_position(text, too_deep.start),
                         f"parentheses and CASE nest more than {MAX_NESTING_DEPTH} deep here; "
                         "split the expression into terms that use each other")
        statements = dialect.parser().parse(tokens, text)
    except (ParseError, TokenError) as failure:
        details = getattr(failure, "errors", None) or [{}]
        line, col = details[0].get("line") or 1, details[0].get("col") or 1
        description = details[0].get("description") or str(failure).splitlines()[0]
        start = _token_start_col(tokens, line, col)
        return error(line, start, f"SQL syntax error: {description}")

    statements = [s for s in statements if s is not None]
    if not statements:
        return error(1, 1, "empty term file; write one SELECT <expression> AS <name>, ... FROM <input>")
    if len(statements) > 1:
        line, col = _second_statement_position(text, tokens)
        return error(line, col, "a term file holds exactly one SELECT; remove the second statement")
    select = normalize_identifiers(statements[0], dialect=TERM_DIALECT)
    if not isinstance(select, exp.Select):
        line, col = tokens and source_position(text, tokens[0].start) or (1, 1)
        return error(line, col, f"a term file must be a SELECT, not {select.key.upper()}")

    _refuse_parts(select, SELECT_PARTS, text, tokens, error)

    source = select.args.get("from_")
    if source is None:
        line, col = source_position(text, tokens[0].start)
        return error(line, col, "missing FROM <input>; name the input the terms are computed over")
    table = source.this
    if not isinstance(table, exp.Table) or not isinstance(table.this, exp.Identifier) or table.args.get("db"):
        line, col = node_position(text, table)
        return error(line, col, "FROM must name one input of the project, e.g. FROM leases")
    alias = table.args.get("alias")
    _refuse_parts(table, INPUT_PARTS, text, tokens, error)
    if alias is not None and alias.args.get("columns"):
        error(*node_position(text, alias), "FROM <input> may not rename the input's columns; use the column names")
    parsed.input = table.name
    parsed.input_position = node_position(text, table)
    parsed.doc = _comment_text(tokens[0].comments)

    spans = _projection_spans(tokens)
    for index, projection in enumerate(select.expressions):
        span = spans[index] if index < len(spans) else range(1)
        first = tokens[span.start]
        line, col = source_position(text, first.start)
        if len(span) > MAX_TERM_TOKENS:
            error(line, col, f"this term holds {len(span):,} tokens, more than {MAX_TERM_TOKENS}; "
                             "split it into terms that use each other")
            continue
        if isinstance(projection, exp.Star) or (isinstance(projection, exp.Column) and isinstance(projection.this, exp.Star)):
            error(line, col, "SELECT * is not allowed; list each term as <expression> AS <name>")
            continue
        if not isinstance(projection, exp.Alias):
            error(line, col, "every term needs a name: write <expression> AS <name>")
            continue
        alias = projection.args["alias"]
        name_line, name_col = source_position(text, alias.meta["start"]) if "start" in alias.meta else (line, col)
        parsed.terms.append(
            RawTerm(projection.alias, table.name, file, name_line, name_col, _comment_text(first.comments), projection.this)
        )
    return parsed


def _comment_text(comments: list[str]) -> str:
    return "\n".join(comment.strip() for comment in comments if comment.strip())


def _projection_spans(tokens: list[Token]) -> list[range]:
    """The token indexes of each projection: from after SELECT or a top-level comma to the next one or FROM."""
    starts, ends, depth, expecting = [], [], 0, False
    for index, token in enumerate(tokens):
        if expecting:
            starts.append(index)
            expecting = False
        if token.token_type == TokenType.SELECT and depth == 0 and not starts:
            expecting = True
        elif token.token_type in (TokenType.L_PAREN, TokenType.L_BRACKET):
            depth += 1
        elif token.token_type in (TokenType.R_PAREN, TokenType.R_BRACKET):
            depth -= 1
        elif token.token_type == TokenType.COMMA and depth == 0:
            ends.append(index)
            expecting = True
        elif token.token_type == TokenType.FROM and depth == 0:
            ends.append(index)
            break
    ends += [len(tokens)] * (len(starts) - len(ends))
    return [range(start, end) for start, end in zip(starts, ends)]


def nesting_depth(sql: str) -> int:
    """How deep parentheses and CASE nest in `sql` (the parser's recursion grows with it).

    >>> nesting_depth("ABS((a + 1) * CASE WHEN b THEN 1 END)")
    2
    """
    depth = deepest = 0
    for token in sqlglot.Dialect.get_or_raise(TERM_DIALECT).tokenize(sql):
        if token.token_type in _OPENING:
            depth += 1
            deepest = max(deepest, depth)
        elif token.token_type in _CLOSING:
            depth -= 1
    return deepest


def _first_too_deep(tokens: list[Token]) -> Token | None:
    """The first token that opens a parenthesis or CASE more than MAX_NESTING_DEPTH levels deep."""
    depth = 0
    for token in tokens:
        if token.token_type in _OPENING:
            depth += 1
            if depth > MAX_NESTING_DEPTH:
                return token
        elif token.token_type in _CLOSING:
            depth -= 1
    return None


def _refuse_parts(node: exp.Expression, allowed: set[str], text: str, tokens: list[Token], error) -> None:
    """Report every part of `node` (a clause of the SELECT, or of FROM <input>) outside `allowed`."""
    for part, value in node.args.items():
        if part in allowed or not value:
            continue
        shown = value[0] if isinstance(value, list) else value
        message = CLAUSES_NOT_ALLOWED.get(part) or (
            f"a term file may not use {part.rstrip('_').replace('_', ' ').upper()} here; "
            "write SELECT <expression> AS <name>, ... FROM <input>")
        error(*_clause_position(text, tokens, part, shown if isinstance(shown, exp.Expression) else node), message)


def _second_statement_position(text: str, tokens: list[Token]) -> tuple[int, int]:
    for index, token in enumerate(tokens):
        if token.token_type == TokenType.SEMICOLON and index + 1 < len(tokens):
            return source_position(text, tokens[index + 1].start)
    return (1, 1)


def _clause_position(text: str, tokens: list[Token], clause: str, node: exp.Expression) -> tuple[int, int]:
    keywords = {
        "where": {TokenType.WHERE}, "group": {TokenType.GROUP_BY}, "having": {TokenType.HAVING},
        "order": {TokenType.ORDER_BY}, "limit": {TokenType.LIMIT}, "offset": {TokenType.OFFSET},
        "distinct": {TokenType.DISTINCT}, "with_": {TokenType.WITH}, "qualify": {TokenType.QUALIFY},
        "joins": {TokenType.JOIN}, "sample": {TokenType.TABLE_SAMPLE, TokenType.USING},
        "pivots": {TokenType.PIVOT, TokenType.UNPIVOT}, "laterals": {TokenType.LATERAL},
    }.get(clause, set())
    for token in tokens:
        if token.token_type in keywords:
            return source_position(text, token.start)
    return node_position(text, node)


def _token_start_col(tokens: list[Token], line: int, end_col: int) -> int:
    """sqlglot reports the column where a token ends; point at where it starts instead."""
    for token in tokens:
        if token.line == line and token.col == end_col:
            return end_col - len(token.text) + 1
    return end_col
