"""Each rule of a request's values is spelt once (``service/usecases/params.py``) and run
once: the HTTP schemas read the values with those rules, the use cases take the typed
values and never run the rules again."""

from __future__ import annotations

import ast
import dataclasses
import re
from pathlib import Path

import pytest
import yaml

from service.api import schemas
from service.usecases import params

ROOT = Path(__file__).resolve().parents[1]
SOURCES = [p for top in ("service", "workers", "likewise_client")
           for p in sorted((ROOT / top).rglob("*.py"))]


def _spelt_in(text: str) -> list[str]:
    return [str(p.relative_to(ROOT)) for p in SOURCES if text in p.read_text()]


def test_the_metric_name_pattern_is_spelt_once() -> None:
    assert _spelt_in(params.NAME_RE.pattern) == ["service/usecases/params.py"]
    # the spec states it too, for clients: it must say the same
    spec = yaml.safe_load((ROOT / "openapi.yaml").read_text())
    assert spec["components"]["schemas"]["MetricName"]["pattern"] == (
        f"^{params.NAME_RE.pattern}$")


@pytest.mark.parametrize("message", [
    "lowercase letters, digits",  # a metric name
    "a version number (whole number",
    'a whole number ≥ 1 or "auto"',  # k
    "{MAX_REASON} characters",  # a reason
    '"a finite number greater than 0"',  # an alpha (the core's own edge says it its way)
    "positive numbers",  # the list of alphas
    "printable characters, no surrounding spaces",  # a feature name
    "{MAX_DESCRIPTION} characters",  # a metric's description
    "a non-empty list of level names",  # a categorical feature's levels
])
def test_each_rule_says_its_message_in_one_place(message: str) -> None:
    assert _spelt_in(message) == ["service/usecases/params.py"], message


RULES = {"version_number", "group_count", "reason", "fit_status", "FIT_FIELDS", "parse",
         "feature_names", "level_map", "description", "missing_policy"}


def test_use_cases_do_not_run_the_schemas_rules_again() -> None:
    """Only a metric name (from the URL path) is read inside a use case."""
    for path in sorted((ROOT / "service" / "usecases").glob("*.py")):
        if path.name == "params.py":
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Call):
                f = node.func
                name = f.attr if isinstance(f, ast.Attribute) else getattr(f, "id", "")
                assert name not in RULES, f"{path.name}:{node.lineno} runs {name}"


def test_the_schemas_read_with_the_rules() -> None:
    fit = schemas.FitSchema()
    assert {k: f.rule for k, f in fit.fields.items()} == params.FIT_FIELDS
    assert [f.name for f in dataclasses.fields(params.FitParams)] == list(
        params.FIT_FIELDS)
    assert schemas.ActivationSchema().fields["version"].rule is params.version_number
    assert schemas.ActivationSchema().fields["reason"].rule is params.reason
    assert schemas.GroupingQuerySchema().fields["k"].rule is params.group_count
    assert schemas.FitQuerySchema().fields["status"].rule is params.fit_status
    metric = schemas.MetricSchema().fields
    assert [metric[k].rule for k in ("features", "description", "categories",
                                     "missing_values")] == [
        params.feature_names, params.description, params.level_map, params.missing_policy]


def test_a_ruled_field_names_the_envelope_field_and_the_rules_message() -> None:
    from marshmallow import ValidationError

    with pytest.raises(ValidationError) as err:
        schemas.FitSchema().load({"alphas": [1, -2], "n_folds": 1, "colour": 3})
    assert err.value.messages == {
        "alphas": {1: ["a finite number greater than 0"]},
        "n_folds": ["a whole number from 2 to 20"], "colour": ["Unknown field."]}
    with pytest.raises(ValidationError) as err:
        schemas.FitQuerySchema().load({"metric": "Bad!"})
    assert list(err.value.messages) == ["metric"]  # the query's name, not the path's
    assert re.search("lowercase", err.value.messages["metric"][0])
    for odd in ("²", "٣", "-1", "1.0", " 2"):  # not ASCII digits: the rule refuses them
        with pytest.raises(ValidationError) as err:
            schemas.PageQuerySchema().load({"limit": odd})
        assert list(err.value.messages) == ["limit"], odd
    with pytest.raises(ValidationError) as err:
        schemas.MetricSchema().load({"features": ["a", " b"], "categories": {"a": []}})
    assert err.value.messages == {
        "features": {1: ["names are 1-128 printable characters, no surrounding spaces"]},
        "categories": {"a": ["a non-empty list of level names"]}}
