"""The operators' console at ``/console/``: server-rendered HTML, no external assets.

Signing in: ``GET /console/`` is a page with no data on it. Its small script
(``service/ui/static/console.js``) keeps the token the operator types in the tab's
``sessionStorage`` (gone when the tab closes; never in a cookie, a URL or a log) and
sends it as ``Authorization: Bearer`` when it fetches the page's parts
(``/console/parts/...``, HTML rendered here, guarded like ``/v1`` by
:func:`~service.api.auth.require_token`) and when it calls ``PUT
/v1/metrics/{name}/active`` to roll back. A header, unlike a cookie, is never sent by
the browser on its own, so no other site can make the console act (no CSRF).
"""

from __future__ import annotations

from pathlib import Path

from flask import Blueprint, Response, render_template

from service.usecases import console as uc

from .auth import current, require_token
from .deps import context

UI = Path(__file__).resolve().parent.parent / "ui"
# scripts only from us; styles from us (matplotlib's inline SVG carries style
# attributes); plots are inline SVG, so no image source is needed
POLICY = ("default-src 'none'; script-src 'self'; style-src 'self' 'unsafe-inline'; "
          "img-src 'self' data:; connect-src 'self'; form-action 'none'; "
          "frame-ancestors 'none'; base-uri 'none'")

bp = Blueprint("console", __name__, url_prefix="/console", static_folder=str(UI / "static"),
               static_url_path="/assets", template_folder=str(UI / "templates"))
parts = Blueprint("parts", __name__, url_prefix="/parts")
parts.before_request(require_token)


@bp.after_request
def _guard(resp: Response) -> Response:
    resp.headers["Content-Security-Policy"] = POLICY
    resp.headers["X-Content-Type-Options"] = "nosniff"
    resp.headers["Referrer-Policy"] = "no-referrer"
    if resp.mimetype == "text/html":
        resp.headers["Cache-Control"] = "no-store"
    return resp


def _html(body: str) -> Response:
    return Response(body, mimetype="text/html")


@bp.get("/")
def page() -> Response:
    """The console's frame and sign-in form (no data: open to anyone)."""
    return _html(render_template("page.html"))


@parts.get("/overview")
def overview() -> Response:
    """The metrics the token may touch and the fit queue with its workers."""
    who = current()
    return _html(render_template("overview.html", o=uc.overview(context(), who.may_touch)))


@parts.get("/metrics/<name>")
def metric(name: str) -> Response:
    """One metric: versions, serving version and history, roll-back, plots."""
    return _html(render_template("metric.html", m=uc.metric_board(context(), name)))


bp.register_blueprint(parts)
