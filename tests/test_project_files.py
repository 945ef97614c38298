"""Loading featpipe.yaml and model specs: every field checked, errors at file:line:col."""

from __future__ import annotations

import pytest
from conftest import PROJECT_YAML, write_project

from featpipe.errors import FeatpipeError
from featpipe.project import load_project


def errors_of(root) -> list[str]:
    with pytest.raises(FeatpipeError) as caught:
        load_project(root)
    return [str(d) for d in caught.value.diagnostics]


def test_a_valid_project_loads_into_dataclasses(project_dir):
    project = load_project(project_dir)
    assert project.name == "shop"
    assert project.engine.kind == "duckdb"
    assert project.engine.path == project_dir / "build" / "shop.duckdb"
    assert project.inputs["orders"].key == "order_id"
    assert project.inputs["orders"].columns["amount"] == "DOUBLE"
    model = project.models["returns"]
    assert (model.family, model.target, model.terms) == ("binomial", "returned", ("item_price", "northern", "items"))
    assert model.holdout.fraction == 0.3 and model.threshold == 0.5


def test_the_project_is_found_from_a_subfolder(project_dir, monkeypatch):
    monkeypatch.chdir(project_dir / "terms")
    assert load_project().root == project_dir


def test_unknown_key_in_the_project_file_names_key_file_and_line(tmp_path):
    root = write_project(tmp_path, {"featpipe.yaml": PROJECT_WITH_TYPO})
    assert errors_of(root) == ["featpipe.yaml:4:3: unknown key 'pth'; did you mean 'path'?"]


PROJECT_WITH_TYPO = """\
name: shop
engine:
  kind: duckdb
  pth: build/x.duckdb
inputs:
  orders:
    key: order_id
    columns: {order_id: BIGINT, amount: DOUBLE, items: BIGINT, region: VARCHAR, returned: BIGINT}
"""


def test_unknown_key_and_bad_values_in_a_model_spec_are_all_reported(tmp_path):
    root = write_project(tmp_path, {"specs/returns.yaml": """\
        input: orders
        target: returned
        family: binomal
        terms: [item_price]
        treshold: 0.5
        holdout: {fraction: 1.5}
        """})
    assert errors_of(root) == [
        "specs/returns.yaml:3:9: unknown family 'binomal'; use one of binomial, poisson, gaussian, gamma, tweedie, quasipoisson, quasibinomial",
        "specs/returns.yaml:5:1: unknown key 'treshold'; did you mean 'threshold'?",
        "specs/returns.yaml:6:21: holdout fraction must be at least 0 and below 1",
    ]


def test_a_yaml_syntax_error_points_at_the_line(tmp_path):
    root = write_project(tmp_path, {"specs/returns.yaml": "input: orders\nterms: [a, b\n"})
    (message,) = errors_of(root)
    assert message.startswith("specs/returns.yaml:3:1: YAML syntax error")


def test_secrets_come_from_the_environment(tmp_path, monkeypatch):
    text = PROJECT_WITH_TYPO.replace("kind: duckdb\n  pth: build/x.duckdb", "kind: postgres\n  dsn: ${SHOP_DSN}")
    root = write_project(tmp_path, {"featpipe.yaml": text})
    assert errors_of(root) == ["featpipe.yaml:4:8: environment variable SHOP_DSN is not set; export it before running"]
    monkeypatch.setenv("SHOP_DSN", "host=127.0.0.1 port=5999")
    assert load_project(root).engine.dsn == "host=127.0.0.1 port=5999"


def test_expectations_must_name_model_terms(tmp_path):
    root = write_project(tmp_path, {"specs/returns.yaml": """\
        input: orders
        target: returned
        family: binomial
        terms: [item_price]
        expect: {item_price: up, northern: positive}
        """})
    assert errors_of(root) == [
        "specs/returns.yaml:5:22: expected sign must be 'positive' or 'negative', not 'up'",
        "specs/returns.yaml:5:26: 'northern' in expect is not one of the model's terms",
    ]


def test_a_key_column_named_like_a_scoring_output_is_refused_at_the_key(tmp_path):
    # The scoring query writes the key next to `prediction`: two columns of one name would fail only at scoring time.
    text = PROJECT_WITH_TYPO.replace("  pth: build/x.duckdb", "  path: build/x.duckdb").replace("order_id", "prediction")
    root = write_project(tmp_path, {"featpipe.yaml": text})
    assert errors_of(root) == [
        "featpipe.yaml:7:10: key 'prediction' is a column the scoring query writes; "
        "key the input by another column, or by a view that renames this one"]


def test_yaml_anchors_and_aliases_are_refused_before_they_expand(tmp_path):
    """A few hundred bytes of nested aliases expand to billions of values: refused at the first anchor."""
    bomb = 'a: &a ["x", "x", "x", "x", "x", "x", "x", "x", "x"]\n' + "".join(
        f"{chr(98 + i)}: &{chr(98 + i)} [*{chr(97 + i)}, *{chr(97 + i)}, *{chr(97 + i)}, *{chr(97 + i)}]\n" for i in range(9))
    root = write_project(tmp_path, {"specs/returns.yaml": bomb})
    with pytest.raises(FeatpipeError) as caught:
        load_project(root)
    assert str(caught.value) == ("specs/returns.yaml:1:4: YAML anchors and aliases (&name, *name) are not allowed in "
                                 "project files; write the value out")


def test_a_column_named_like_a_yaml_boolean_stays_a_name(tmp_path):
    """YAML 1.1 reads an unquoted yes, no, on or off as a boolean; a key is always read as written."""
    root = write_project(tmp_path, {"featpipe.yaml": PROJECT_YAML.replace("      returned: BIGINT\n", "      returned: BIGINT\n      on: BIGINT\n")})
    assert load_project(root).inputs["orders"].columns["on"] == "BIGINT"
