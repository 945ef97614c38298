"""The term compiler on real files: one test per error kind, with the exact position and message."""

from __future__ import annotations

import pytest
from conftest import write_project

from featpipe.compiler import compile_project
from featpipe.errors import FeatpipeError
from featpipe.project import load_project


def compile_dir(root):
    return compile_project(load_project(root))


def errors_of(root, **files) -> list[str]:
    write_project(root, {f"terms/{name}.sql": text for name, text in files.items()})
    with pytest.raises(FeatpipeError) as caught:
        compile_dir(root)
    return [str(d) for d in caught.value.diagnostics]


def test_terms_carry_docs_inlined_sql_and_fingerprints(project_dir):
    compiled = compile_dir(project_dir)
    price = compiled.terms["item_price"]
    assert price.doc == "Average price of one item."
    assert (price.file, price.line, price.col) == ("terms/basket.sql", 4, 32)
    assert price.sql == '"amount" / NULLIF("items", 0)'
    assert price.kind == "numeric" and compiled.terms["northern"].kind == "numeric"
    model = compiled.models["returns"]
    assert [t.name for t in model.terms] == ["item_price", "northern", "items"]
    assert model.layout.table == "design_returns"


def test_references_are_inlined_in_dependency_order(tmp_path):
    root = write_project(tmp_path, {"terms/more.sql": """\
        SELECT
          item_price * northern AS northern_price,
          -- A term may be used before the file that defines it.
          northern_price + 1 AS shifted
        FROM orders
        """})
    compiled = compile_dir(root)
    # Only the parentheses the tree needs survive: (a / b) * c is written a / b * c.
    assert compiled.terms["shifted"].sql == '"amount" / NULLIF("items", 0) * CASE WHEN "region" = \'north\' THEN 1 ELSE 0 END + 1'
    assert compiled.terms["shifted"].built_from == ("item_price", "northern", "northern_price")
    assert compiled.terms["shifted"].columns == ("amount", "items", "region")


def test_projection_without_a_name(tmp_path):
    assert errors_of(tmp_path, extra="SELECT\n  amount * 2\nFROM orders\n") == [
        "terms/extra.sql:2:3: every term needs a name: write <expression> AS <name>"]


def test_select_star(tmp_path):
    assert errors_of(tmp_path, extra="SELECT * FROM orders") == [
        "terms/extra.sql:1:8: SELECT * is not allowed; list each term as <expression> AS <name>"]


def test_a_second_statement_is_refused_and_nothing_runs(tmp_path):
    assert errors_of(tmp_path, extra="SELECT amount AS a2 FROM orders; DROP TABLE orders") == [
        "terms/extra.sql:1:34: a term file holds exactly one SELECT; remove the second statement"]


def test_unknown_name_gets_a_suggestion(tmp_path):
    assert errors_of(tmp_path, extra="SELECT\n  amonut * 2 AS doubled\nFROM orders\n") == [
        "terms/extra.sql:2:3: unknown name 'amonut': not a column of input 'orders' nor a term; did you mean 'amount'?"]


def test_unknown_input(tmp_path):
    assert errors_of(tmp_path, extra="SELECT amount AS a2 FROM order") == [
        "terms/extra.sql:1:26: unknown input 'order'; did you mean 'orders'?"]


def test_cycle_is_reported_in_full(tmp_path):
    assert errors_of(tmp_path, extra="SELECT\n  b + 1 AS a,\n  a * 2 AS b\nFROM orders\n") == [
        "terms/extra.sql:2:12: terms depend on each other in a cycle: a -> b -> a"]


def test_duplicate_names_across_files(tmp_path):
    assert errors_of(tmp_path, extra="SELECT amount AS item_price FROM orders") == [
        "terms/extra.sql:1:18: term 'item_price' is already defined at terms/basket.sql:4:32; names are unique across the project"]


def test_a_term_named_like_a_scoring_output_column(tmp_path):
    # Before this check, a term named status failed `featpipe score` with an engine's cast error.
    # Names are compared without case (the parser lowers them): Prediction is the prediction column too.
    assert errors_of(tmp_path, extra="SELECT\n  amount * 2 AS status,\n  items AS Prediction\nFROM orders\n") == [
        "terms/extra.sql:2:17: term name 'status' is a column the scoring query writes; choose another name",
        "terms/extra.sql:3:12: term name 'prediction' is a column the scoring query writes; choose another name"]


def test_a_term_named_linear_predictor(tmp_path):
    # Before this check, such a term silently took the linear predictor's training profile.
    assert errors_of(tmp_path, extra="SELECT amount * 2 AS linear_predictor FROM orders") == [
        "terms/extra.sql:1:22: term name 'linear_predictor' is a column the scoring query writes; choose another name"]


def test_a_term_named_like_a_contribution_or_a_reason_code(tmp_path):
    assert errors_of(tmp_path, extra="SELECT\n  amount AS contribution_x,\n  items AS reason_2,\n  items AS reason_code\nFROM orders\n") == [
        "terms/extra.sql:2:13: term name 'contribution_x' has the form of the scoring query's contribution_<term> "
        "columns; choose another name",
        "terms/extra.sql:3:12: term name 'reason_2' has the form of the scoring query's reason_<k> columns; "
        "choose another name"]


def test_a_term_name_holding_a_double_underscore(tmp_path):
    assert errors_of(tmp_path, extra="SELECT amount * 2 AS amount__doubled FROM orders") == [
        "terms/extra.sql:1:22: term name 'amount__doubled' holds '__', which the drift query's <name>__<what> "
        "columns use; choose another name"]


def test_an_input_column_named_like_a_scoring_output_cannot_be_listed_as_a_term(tmp_path):
    root = write_project(tmp_path / "shop")
    project_file = root / "featpipe.yaml"
    project_file.write_text(project_file.read_text().replace("      returned: BIGINT\n", "      returned: BIGINT\n      status: BIGINT\n"))
    (root / "specs" / "returns.yaml").write_text("input: orders\ntarget: returned\nfamily: binomial\nterms: [items, status]\n")
    with pytest.raises(FeatpipeError) as caught:
        compile_dir(root)
    assert [str(d) for d in caught.value.diagnostics] == [
        "specs/returns.yaml:4:16: column 'status' is a column the scoring query writes, so it cannot be a term "
        "as it is; define a term with another name for it"]


def test_a_column_qualified_by_its_own_input_is_that_column(tmp_path):
    """`orders.amount` in a file reading FROM orders is `amount`: same type, same SQL, same fingerprint."""
    qualified = compile_dir(write_project(tmp_path / "a", {"terms/extra.sql": "SELECT orders.amount * 2 AS twice FROM orders"}))
    plain = compile_dir(write_project(tmp_path / "b", {"terms/extra.sql": "SELECT amount * 2 AS twice FROM orders"}))
    assert qualified.terms["twice"].kind == "numeric"
    assert qualified.terms["twice"].sql == plain.terms["twice"].sql == '"amount" * 2'
    assert qualified.terms["twice"].fingerprint == plain.terms["twice"].fingerprint


def test_a_column_qualified_by_another_table_is_refused(tmp_path):
    assert errors_of(tmp_path, extra="SELECT o.amount * 2 AS twice FROM orders") == [
        "terms/extra.sql:1:8: 'o.amount' names another table; a term reads only its input 'orders'"]


def test_arithmetic_on_text(tmp_path):
    assert errors_of(tmp_path, extra="SELECT\n  amount + region AS odd\nFROM orders\n") == [
        "terms/extra.sql:2:12: arithmetic on text: 'region' is TEXT; compare it to a value "
        "(e.g. CASE WHEN x = 'a' THEN 1 ELSE 0 END) or CAST it"]


def test_a_text_valued_term(tmp_path):
    assert errors_of(tmp_path, extra="SELECT\n  UPPER(region) AS shouty\nFROM orders\n") == [
        "terms/extra.sql:2:3: a term must be numeric or boolean, but this expression is VARCHAR; "
        "turn text into indicators, e.g. CASE WHEN x = 'a' THEN 1 ELSE 0 END"]


def test_leakage_through_another_term(tmp_path):
    root = write_project(tmp_path, {
        "terms/leak.sql": "SELECT\n  returned * 2 AS flag,\n  flag + items AS mixed\nFROM orders\n",
        "specs/returns.yaml": "input: orders\ntarget: returned\nfamily: binomial\nterms: [item_price, mixed]\n",
    })
    with pytest.raises(FeatpipeError) as caught:
        compile_dir(root)
    assert [str(d) for d in caught.value.diagnostics] == [
        "specs/returns.yaml:4:21: leakage: term 'mixed' reads the target 'returned' (mixed -> flag -> returned); "
        "a term must be known before the outcome"]


def test_unknown_model_term(tmp_path):
    root = write_project(tmp_path, {"specs/returns.yaml": "input: orders\ntarget: returned\nfamily: binomial\nterms: [item_prise]\n"})
    with pytest.raises(FeatpipeError) as caught:
        compile_dir(root)
    assert [str(d) for d in caught.value.diagnostics] == [
        "specs/returns.yaml:4:9: unknown term 'item_prise'; did you mean 'item_price'?"]


def test_every_error_of_a_run_is_reported_at_once(tmp_path):
    messages = errors_of(tmp_path, extra="SELECT\n  amonut AS a1,\n  RANDOM() AS a2,\n  SUM(amount) AS a3\nFROM orders\n")
    assert [m.split(": ")[0] for m in messages] == ["terms/extra.sql:2:3", "terms/extra.sql:3:3", "terms/extra.sql:4:3"]


def fingerprint_after(tmp_path, name: str, basket: str) -> str:
    root = write_project(tmp_path / name, {"terms/basket.sql": basket})
    return compile_dir(root).terms["item_price"].fingerprint


BASKET = "SELECT amount / NULLIF(items, 0) AS item_price, CASE WHEN region = 'north' THEN 1 ELSE 0 END AS northern FROM orders"


@pytest.mark.parametrize("edit", [
    "select\n   AMOUNT/nullif(ITEMS,0)   as item_price,\n CASE WHEN region = 'north' THEN 1 ELSE 0 END AS northern from orders",
    "SELECT\n  -- price of one item\n  ((amount)) / NULLIF((items), 0) AS item_price, CASE WHEN region = 'north' THEN 1 ELSE 0 END AS northern FROM orders",
    'SELECT "amount" / NULLIF("items", 0) AS item_price, CASE WHEN region = \'north\' THEN 1 ELSE 0 END AS northern FROM orders',
])
def test_formatting_comments_case_quotes_and_parentheses_keep_the_fingerprint(tmp_path, edit):
    assert fingerprint_after(tmp_path, "edited", edit) == fingerprint_after(tmp_path, "original", BASKET)


@pytest.mark.parametrize(("written", "same_as"), [
    ("amount * 0.30", "amount * 0.3"),
    ("amount * 1e3", "amount * 1000"),
    ("amount * 1000.0", "amount * 1000"),
    ("amount / 2.50E1", "amount / 25"),
])
def test_a_number_spelled_another_way_keeps_the_fingerprint(tmp_path, written, same_as):
    """Numbers are canonical by value: generated SQL casts every number to DOUBLE, so spelling is no meaning."""
    def fingerprint(name: str, expression: str) -> str:
        return fingerprint_after(tmp_path, name, BASKET.replace("amount / NULLIF(items, 0)", expression))

    assert fingerprint("written", written) == fingerprint("same_as", same_as)


@pytest.mark.parametrize("edit", [
    BASKET.replace("NULLIF(items, 0)", "NULLIF(items, 1)"),
    BASKET.replace("amount /", "amount * 1.0 /"),
    BASKET.replace("amount / NULLIF(items, 0)", "items / NULLIF(amount, 0)"),
])
def test_every_change_of_meaning_changes_the_fingerprint(tmp_path, edit):
    assert fingerprint_after(tmp_path, "edited", edit) != fingerprint_after(tmp_path, "original", BASKET)


def test_a_change_in_a_used_term_changes_the_users_fingerprint(tmp_path):
    user = {"terms/more.sql": "SELECT item_price * 2 AS double_price FROM orders"}
    before = compile_dir(write_project(tmp_path / "a", user)).terms["double_price"].fingerprint
    after = compile_dir(write_project(tmp_path / "b", {**user, "terms/basket.sql": BASKET.replace("NULLIF(items, 0)", "items")}))
    assert after.terms["double_price"].fingerprint != before


def test_terms_that_grow_too_large_once_inlined_are_refused_at_the_first_one(tmp_path):
    """Each term is small, but each doubles the one before; written out, t12 would hold 2^12 copies."""
    doubling = ["SELECT", "  amount AS t0,"] + [f"  t{i - 1} + t{i - 1} AS t{i}," for i in range(1, 16)]
    assert errors_of(tmp_path, extra="\n".join([*doubling, "  items AS last", "FROM orders"])) == [
        "terms/extra.sql:14:16: term 't12' grows to 20,477 parts nested 25 deep once the terms it uses are "
        "written out (at most 20,000 parts, 250 deep); build it from fewer or simpler terms"]


def test_terms_that_nest_too_deep_once_inlined_are_refused(tmp_path):
    """Terms of 19 nested ABS each are within a file's limit alone; written out into one another they
    nest 38 deep, deeper than scoring could safely parse the fitted SQL back."""
    def nested(inner: str) -> str:
        return "ABS(" * 19 + inner + ")" * 19

    text = f"SELECT\n  {nested('amount')} AS a1,\n  {nested('a1')} AS a2,\n  {nested('a2')} AS a3\nFROM orders"
    assert errors_of(tmp_path, extra=text) == [
        "terms/extra.sql:3:104: term 'a2' nests parentheses and CASE 38 deep once the terms it uses are written out "
        "(at most 30); build it from fewer or shallower terms"]
