"""Learned terms (LEVELS, BINS, SPLINE, CAPPED): recognised and checked by the compiler, constants learned
from the training rows in the engine, several design columns per term, fitted and scored as one term."""

from __future__ import annotations

import pytest
from conftest import write_project

from featpipe.compiler import compile_project
from featpipe.errors import FeatpipeError
from featpipe.project import load_project


def errors_of(root, text: str) -> list[str]:
    write_project(root, {"terms/learned.sql": text})
    with pytest.raises(FeatpipeError) as caught:
        compile_project(load_project(root))
    return [str(d) for d in caught.value.diagnostics]


def test_a_learned_call_compiles_to_its_argument_with_a_fingerprint_of_the_whole_call(tmp_path):
    write_project(tmp_path, {"terms/learned.sql": "SELECT LEVELS(region, 2) AS region_level,\n"
                                                  "  levels(region, 3) AS region_level3,\n"
                                                  "  CAPPED(amount, 0.05, 0.95) AS capped_amount FROM orders\n"})
    terms = compile_project(load_project(tmp_path)).terms
    levels, levels3, capped = terms["region_level"], terms["region_level3"], terms["capped_amount"]
    assert (levels.sql, levels.kind, levels.learned.function, levels.learned.arguments) == ('"region"', "text", "LEVELS", (2,))
    assert levels.fingerprint != levels3.fingerprint  # min_rows is part of the term's meaning
    assert (capped.sql, capped.kind, capped.learned.arguments) == ('"amount"', "numeric", (0.05, 0.95))


@pytest.mark.parametrize(("call", "message"), [
    ("LEVELS(region)", "1:8: LEVELS takes 2 arguments: write LEVELS(expr, min_rows)"),
    ("LEVELS(region, 0)", "1:23: LEVELS needs min_rows as a whole number of at least 1, not 0"),
    ("LEVELS(region, items)", "1:23: LEVELS's arguments after the expression must be numbers: write LEVELS(expr, min_rows)"),
    ("BINS(amount, 1)", "1:21: BINS takes 2 to 20 bins, not 1"),
    ("BINS(amount, 2.5)", "1:21: BINS takes 2 to 20 bins, not 2.5"),
    ("SPLINE(amount, 8)", "1:23: SPLINE takes 3 to 7 knots, not 8"),
    ("CAPPED(amount, 0.9, 0.1)", "1:23: CAPPED needs 0 <= p_low < p_high <= 1, not 0.9 and 0.1"),
    ("1 + CAPPED(amount, 0.1, 0.9)", "1:12: CAPPED(...) must be the whole expression of a term: write it as its own "
                                     "projection and do not use it inside another expression"),
    ("LEVELS(amount, 5)", "1:15: LEVELS reads text or whole numbers; for a decimal number use BINS(expr, k)"),
    ("SPLINE(region, 4)", "1:15: SPLINE reads a number, not a text expression"),
    ("BINS(amount > 1, 4)", "1:13: BINS reads a number, not a boolean expression"),
    ("LEVELS(region + 1, 5)", "1:15: arithmetic on text: 'region' is TEXT; compare it to a value (e.g. CASE WHEN "
                              "x = 'a' THEN 1 ELSE 0 END) or CAST it"),
])
def test_learned_call_problems_are_positioned(tmp_path, call, message):
    assert errors_of(tmp_path, f"SELECT\n       {call} AS learned FROM orders\n") == [
        f"terms/learned.sql:{int(message.split(':')[0]) + 1}:{message.split(':', 1)[1]}"]


def test_other_terms_may_not_use_a_learned_term(tmp_path):
    errors = errors_of(tmp_path, "SELECT CAPPED(amount, 0.1, 0.9) AS capped_amount,\n"
                                 "  capped_amount * 2 AS doubled FROM orders\n")
    assert errors == ["terms/learned.sql:2:3: term 'capped_amount' is a learned term (CAPPED); other terms may not "
                      "use it: use its argument expression instead"]
