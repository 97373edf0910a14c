"""The console's routes through the Flask test client, checked against openapi.yaml:
the open frame and assets, the token-guarded parts, and what the parts show."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path
from typing import Any
from xml.etree import ElementTree

from service.api import create_app
from service.context import Context
from service.tokens import digest
from tests.api.helpers import IRIS_FEATURES, as_records, assert_problem, iris_batches, post_batches
from tests.api.spec import SpecClient

SVG = re.compile(r"<svg\b.*?</svg>", re.S)


def test_the_frame_and_its_assets_are_open_and_carry_no_data(api: SpecClient) -> None:
    resp = api.get("/console/", auth=False)
    assert resp.status_code == 200 and resp.mimetype == "text/html"
    page = resp.get_data(as_text=True)
    assert 'id="sign-in-form"' in page and "console.js" in page
    # the token field has no name, so no form submission can carry it
    token_input = re.search(r'<input id="token"[^>]*>', page).group(0)
    assert "name=" not in token_input
    policy = resp.headers["Content-Security-Policy"]
    assert "script-src 'self'" in policy and "default-src 'none'" in policy
    assert resp.headers["Cache-Control"] == "no-store"
    for asset, mime in (("console.js", "text/javascript"), ("console.css", "text/css")):
        got = api.get(f"/console/assets/{asset}", auth=False)
        assert got.status_code == 200 and got.mimetype == mime
        assert "http://" not in got.get_data(as_text=True)  # no external source
        assert "https://" not in got.get_data(as_text=True)
        again = api.get(f"/console/assets/{asset}", auth=False,
                        headers={"If-None-Match": got.headers["ETag"]})
        assert again.status_code == 304  # the browser's copy is still good
        got.close()


def test_the_parts_need_a_valid_token(api: SpecClient, metric: str) -> None:
    for path in ("/console/parts/overview", f"/console/parts/metrics/{metric}"):
        assert_problem(api.get(path, auth=False), 401)
        assert_problem(api.get(path, token="not-a-token"), 401)


def test_a_missing_metric_is_a_404_and_a_bad_name_a_422_problem(api: SpecClient) -> None:
    assert_problem(api.get("/console/parts/metrics/nothing-here"), 404)
    assert_problem(api.get("/console/parts/metrics/Not_A_Name"), 422, "name")
    assert_problem(api.get("/console/assets/nothing.js", auth=False), 404)


def test_a_token_limited_to_some_metrics_sees_only_those(
    api: SpecClient, ctx: Context, metric: str, tmp_path: Path
) -> None:
    assert api.put("/v1/metrics/other", json={"features": IRIS_FEATURES}).status_code == 201
    book = tmp_path / "tokens.json"
    book.write_text(json.dumps({"tokens": [
        {"name": "iris-team", "sha256": digest("iris-only"), "scopes": ["view"],
         "metrics": ["iris*"]}]}))
    app = create_app(context=Context.build(ctx.settings.replace(token_file=str(book)),
                                           connection=ctx.redis))
    limited = SpecClient(app, "iris-only")
    html = limited.get("/console/parts/overview").get_data(as_text=True)
    assert 'data-metric="iris"' in html and 'data-metric="other"' not in html
    assert limited.get(f"/console/parts/metrics/{metric}").status_code == 200
    assert_problem(limited.get("/console/parts/metrics/other"), 403)


def test_the_metric_part_shows_versions_history_plots_and_the_rollback(
    api: SpecClient, fitted: dict, fit_to_version: Any
) -> None:
    post_batches(api, "iris", iris_batches(2, seed=7))
    second = fit_to_version("iris", activate="at_once", method="diagonal")
    assert second["version"] == 2
    resp = api.get("/console/parts/metrics/iris")
    assert resp.status_code == 200 and resp.mimetype == "text/html"
    html = resp.get_data(as_text=True)
    svgs = SVG.findall(html)
    assert len(svgs) == 3  # versions, weights, projection
    for svg in svgs:
        ElementTree.fromstring(svg)  # each plot is well-formed SVG
    weights = svgs[1]
    for feature in IRIS_FEATURES:  # the bars are keyed by feature name (text in the SVG)
        assert feature in weights
    assert "version 2 serving" in html
    assert 'data-to="1"' in html and "Roll back to version 1" in html
    assert "not used to fit version 2" not in html  # every batch trained version 2
    assert html.count("<li data-from") == 2
    # once records were grouped, a drift panel: their margins against the training ones
    X, _ = iris_batches(1, seed=8)[0]
    assert api.post("/v1/metrics/iris/groupings", json={"records": as_records(X),
                                                        "k": 3}).status_code == 200
    html = api.get("/console/parts/metrics/iris").get_data(as_text=True)
    svgs = SVG.findall(html)
    assert len(svgs) == 4 and 'id="plot-margins"' in html
    ElementTree.fromstring(svgs[2])
    text = " ".join(html.split())
    assert f"margins of the {len(X)} records" in text
    assert "against its training batches as cross-validation held them out" in text
    assert "training batches held out in cross-validation" in svgs[2]  # the legend


def test_the_overview_lists_metrics_and_the_queue(api: SpecClient, fitted: dict) -> None:
    resp = api.get("/console/parts/overview")
    assert resp.status_code == 200
    html = resp.get_data(as_text=True)
    assert 'data-metric="iris"' in html and "v1 serving" in html
    assert "Fit queue" in html and "Workers" in html


def test_the_api_does_not_load_matplotlib_until_a_plot_is_drawn() -> None:
    code = ("import sys; from service.api import create_app; from service.config import "
            "Settings; create_app(Settings(redis_url='redis://127.0.0.1:1/0', "
            "admin_token='x')); assert 'matplotlib' not in sys.modules, 'loaded'")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == 0, done.stderr
