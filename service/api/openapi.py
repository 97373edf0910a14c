"""The API's own description, ``/openapi.yaml`` and ``/openapi.json`` (no auth).

The document is static and carries no deployment data, so it is open like the
probes; it stays outside ``/v1``, where every route needs a Bearer token. It is read
from the repository's ``openapi.yaml`` (a source checkout or editable install) or
from the copy an image ships inside the package (``service/api/openapi.yaml``).
"""

from __future__ import annotations

import json
from functools import lru_cache
from pathlib import Path

import yaml
from flask import Blueprint, Response

bp = Blueprint("openapi", __name__)

_PLACES = (Path(__file__).with_name("openapi.yaml"),
           Path(__file__).resolve().parents[2] / "openapi.yaml")
YAML_TYPE = "application/yaml"  # RFC 9512


@lru_cache(maxsize=1)
def _document() -> tuple[bytes, bytes]:
    """The spec as written (YAML) and as JSON, read once per process."""
    for place in _PLACES:
        if place.is_file():
            raw = place.read_bytes()
            as_json = json.dumps(yaml.safe_load(raw), ensure_ascii=False).encode()
            return raw, as_json
    raise FileNotFoundError("openapi.yaml is not installed with the service")


@bp.get("/openapi.yaml")
def openapi_yaml() -> Response:
    return Response(_document()[0], mimetype=YAML_TYPE)


@bp.get("/openapi.json")
def openapi_json() -> Response:
    return Response(_document()[1], mimetype="application/json")
