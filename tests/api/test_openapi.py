"""The app serves its own description, open like the probes, exactly as openapi.yaml says."""

from __future__ import annotations

import json

import yaml

from .spec import SPEC_PATH, SpecClient, load_spec


def test_the_spec_is_served_as_yaml_and_json_without_a_token(api: SpecClient) -> None:
    as_yaml = api.get("/openapi.yaml", auth=False)
    assert as_yaml.status_code == 200 and as_yaml.mimetype == "application/yaml"
    assert as_yaml.get_data() == SPEC_PATH.read_bytes()  # the file as written
    assert yaml.safe_load(as_yaml.get_data()) == load_spec()
    as_json = api.get("/openapi.json", auth=False)
    assert as_json.status_code == 200 and as_json.mimetype == "application/json"
    assert json.loads(as_json.get_data()) == load_spec()
    # it lists itself
    assert {"/openapi.yaml", "/openapi.json"} <= set(load_spec()["paths"])


def test_a_token_is_not_needed_but_does_no_harm(api: SpecClient) -> None:
    assert api.get("/openapi.json").status_code == 200
    assert api.get("/openapi.json", token="not-a-token").status_code == 200
