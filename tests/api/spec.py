"""openapi.yaml as a test oracle: route templates, and response checks against it.

``SpecClient`` wraps Flask's test client: every response it returns has already been
checked against the spec (status documented for that path and method, media type,
body valid under the JSON Schema (Draft 2020-12) of that status, documented headers
present, empty body for 204). A 2xx answer to a JSON body also checks the request body
against the spec's request schema, so the spec cannot be stricter than the app.
"""

from __future__ import annotations

import json
import re
from functools import cache
from pathlib import Path
from typing import Any

import yaml
from flask import Flask
from flask.testing import FlaskClient
from jsonschema import Draft202012Validator
from referencing import Registry, Resource
from referencing.jsonschema import DRAFT202012
from werkzeug.exceptions import HTTPException
from werkzeug.test import TestResponse
from werkzeug.wrappers import Response

SPEC_PATH = Path(__file__).resolve().parents[2] / "openapi.yaml"
SPEC_URI = "urn:likewise:openapi"
HTTP_METHODS = ("get", "put", "post", "delete", "patch")
_CONVERTER = re.compile(r"<(?:[^:<>]+:)?([^<>]+)>")
# (path, method, status) answered in this session, over every SpecClient.
SEEN: set[tuple[str, str, int]] = set()


@cache
def load_spec() -> dict[str, Any]:
    with SPEC_PATH.open(encoding="utf-8") as fh:
        return yaml.safe_load(fh)


def openapi_path(rule: str) -> str:
    """``/v1/metrics/<name>/versions/<int:n>`` → ``/v1/metrics/{name}/versions/{n}``."""
    return _CONVERTER.sub(r"{\1}", rule)


def app_operations(app: Flask) -> set[tuple[str, str]]:
    """(OpenAPI path, lower-case method) of every route the app serves (no HEAD/OPTIONS)."""
    ops = set()
    for rule in app.url_map.iter_rules():
        for method in rule.methods or ():
            if method not in ("HEAD", "OPTIONS"):
                ops.add((openapi_path(rule.rule), method.lower()))
    return ops


def spec_operations(spec: dict[str, Any]) -> set[tuple[str, str]]:
    return {
        (path, method)
        for path, item in spec["paths"].items()
        for method in item
        if method in HTTP_METHODS
    }


def _pointer(*parts: str) -> str:
    return "/".join(p.replace("~", "~0").replace("/", "~1") for p in parts)


class SpecChecker:
    """Validates JSON bodies against schemas inside the spec (refs resolved in place)."""

    def __init__(self, spec: dict[str, Any]) -> None:
        self.spec = spec
        resource = Resource.from_contents(spec, default_specification=DRAFT202012)
        self.registry = Registry().with_resource(SPEC_URI, resource)

    def _deref(self, node: dict[str, Any]) -> dict[str, Any]:
        while "$ref" in node and node["$ref"].startswith("#/components/"):
            target: Any = self.spec
            for part in node["$ref"][2:].split("/"):
                target = target[part]
            node = target
        return node

    def errors(self, pointer: str, instance: Any) -> list[str]:
        validator = Draft202012Validator({"$ref": f"{SPEC_URI}#{pointer}"}, registry=self.registry)
        return [
            f"{'/'.join(map(str, e.absolute_path)) or '<root>'}: {e.message}"
            for e in validator.iter_errors(instance)
        ]

    def problem_errors(self, body: Any) -> list[str]:
        return self.errors("/components/schemas/Problem", body)

    def check_response(self, path: str, method: str, resp: Response) -> None:
        where = f"{method.upper()} {path} → {resp.status_code}"
        op = self.spec["paths"][path][method]
        documented = op["responses"].get(str(resp.status_code))
        assert documented is not None, f"{where}: status not documented in openapi.yaml"
        documented = self._deref(documented)
        for header in documented.get("headers", {}):
            assert header in resp.headers, f"{where}: documented header {header} missing"
        content = documented.get("content")
        if not content:
            assert resp.get_data() == b"", f"{where}: expected an empty body"
            return
        assert resp.mimetype in content, f"{where}: {resp.mimetype} not in {sorted(content)}"
        if not resp.mimetype.endswith("json"):
            return
        body = json.loads(resp.get_data(as_text=True))
        pointer = self._response_pointer(path, method, resp.status_code, resp.mimetype)
        problems = self.errors(pointer, body)
        assert not problems, f"{where}: body does not match the spec:\n" + "\n".join(problems)

    def _response_pointer(self, path: str, method: str, status: int, mime: str) -> str:
        response = self.spec["paths"][path][method]["responses"][str(status)]
        if "$ref" in response:
            base = "/" + response["$ref"][2:]
        else:
            base = "/" + _pointer("paths", path, method, "responses", str(status))
        return base + "/" + _pointer("content", mime, "schema")

    def check_request(self, path: str, method: str, body: Any) -> None:
        op = self.spec["paths"][path][method]
        assert "requestBody" in op, f"{method.upper()} {path}: a body was sent, none documented"
        pointer = "/" + _pointer(
            "paths", path, method, "requestBody", "content", "application/json", "schema"
        )
        problems = self.errors(pointer, body)
        assert not problems, (
            f"{method.upper()} {path}: the app accepted a body the spec rejects:\n"
            + "\n".join(problems)
        )


class SpecClient:
    """Flask test client whose every response is checked against openapi.yaml.

    ``token`` is sent as Bearer unless ``auth=False`` (or another ``token=``) is given.
    Every checked answer is added to :data:`SEEN` (for the coverage summary).
    """

    def __init__(self, app: Flask, token: str | None) -> None:
        self.app = app
        self.client: FlaskClient = app.test_client()
        self.token = token
        self.checker = SpecChecker(load_spec())

    def _route(self, method: str, path: str) -> str | None:
        adapter = self.app.url_map.bind("localhost")
        try:
            rule, _ = adapter.match(path.split("?", 1)[0], method=method, return_rule=True)
        except HTTPException:
            return None
        return openapi_path(rule.rule)

    def open(
        self, method: str, path: str, *, auth: bool = True, token: str | None = None,
        **kwargs: Any,
    ) -> TestResponse:
        headers = dict(kwargs.pop("headers", None) or {})
        bearer = token if token is not None else (self.token if auth else None)
        if bearer is not None and "Authorization" not in headers:
            headers["Authorization"] = f"Bearer {bearer}"
        resp = self.client.open(path, method=method, headers=headers, **kwargs)
        template = self._route(method, path)
        if template is None:
            # No route (404) or wrong method (405): still a problem body.
            assert resp.status_code in (404, 405), f"{method} {path}: {resp.status_code}"
            assert resp.mimetype == "application/problem+json"
            assert not self.checker.problem_errors(resp.get_json())
            return resp
        self.checker.check_response(template, method.lower(), resp)
        SEEN.add((template, method.lower(), resp.status_code))
        if 200 <= resp.status_code < 300 and "json" in kwargs:
            self.checker.check_request(template, method.lower(), kwargs["json"])
        return resp

    def get(self, path: str, **kwargs: Any) -> TestResponse:
        return self.open("GET", path, **kwargs)

    def put(self, path: str, **kwargs: Any) -> TestResponse:
        return self.open("PUT", path, **kwargs)

    def post(self, path: str, **kwargs: Any) -> TestResponse:
        return self.open("POST", path, **kwargs)

    def delete(self, path: str, **kwargs: Any) -> TestResponse:
        return self.open("DELETE", path, **kwargs)


UNPROVOKED = ("InternalError", "Unavailable", "Contention")


def unexercised(spec: dict[str, Any]) -> list[str]:
    """Documented (method, path, status) no test answered, except the generic answers a
    test cannot provoke without fault injection (:data:`UNPROVOKED`)."""
    out = []
    for path, item in spec["paths"].items():
        for method, op in item.items():
            if method not in HTTP_METHODS:
                continue
            for status, resp in op["responses"].items():
                generic = resp.get("$ref", "").rsplit("/", 1)[-1] in UNPROVOKED
                if not generic and (path, method, int(status)) not in SEEN:
                    out.append(f"{method.upper()} {path} {status}")
    return out
