"""No Docker engine runs here; parse the compose file and check what the deployment relies on."""

from __future__ import annotations

from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parent.parent


def _compose() -> dict:
    return yaml.safe_load((ROOT / "docker-compose.yml").read_text())


def test_redis_keeps_an_append_only_file_on_a_volume():
    redis = _compose()["services"]["redis"]
    command = " ".join(redis["command"])
    assert "--appendonly yes" in command
    assert "--appendfsync everysec" in command
    volumes = [v.split(":") for v in redis["volumes"]]
    assert ["redis-data", "/data"] in volumes
    assert "redis-data" in _compose()["volumes"]
    assert "healthcheck" in redis


def test_api_runs_under_gunicorn_with_a_healthcheck_and_no_baked_secret():
    api = _compose()["services"]["api"]
    assert api["command"][0] == "gunicorn"
    assert "service.api:create_app()" in api["command"]
    assert "/healthz" in " ".join(api["healthcheck"]["test"])
    # the token must come from the operator, never a default in the file
    assert api["environment"]["LIKEWISE_ADMIN_TOKEN"].startswith("${LIKEWISE_ADMIN_TOKEN:?")
    assert api["environment"]["LIKEWISE_REDIS_URL"].startswith("redis://redis:")


def test_workers_can_scale():
    worker = _compose()["services"]["worker"]
    # --scale worker=3 needs no fixed container name and no published host port
    assert "container_name" not in worker
    assert "ports" not in worker
    assert worker["command"] == ["likewise", "worker"]
    assert worker["depends_on"]["redis"]["condition"] == "service_healthy"


def test_worker_image_is_built_here_and_its_healthcheck_checks_the_worker():
    services = _compose()["services"]
    worker, api = services["worker"], services["api"]
    # an image only the api builds would be pulled from a registry for the worker
    assert worker.get("build") == api["build"] and worker["image"] == api["image"]
    # a Redis ping says nothing about the worker; the check looks for this host's worker
    check = " ".join(worker["healthcheck"]["test"])
    assert "Worker.all" in check and "gethostname" in check


def test_image_runs_the_same_entry_point():
    dockerfile = (ROOT / "Dockerfile").read_text()
    assert "service.api:create_app()" in dockerfile
    assert "pip install ." in dockerfile
