"""Bearer tokens and scopes for every ``/v1`` route and the console's data parts (see
:mod:`service.tokens`).

Every ``/v1`` endpoint needs one scope (:data:`SCOPE_OF`; an endpoint missing from
the table is refused, never open). A token restricted to some metrics may touch
only those: a route naming a metric (or a fit of one) outside them is a 403, and
lists show only the metrics it may touch. The principal's name is ``who`` for
activations and ``requested_by`` for fits.
"""

from __future__ import annotations

from flask import current_app, g, request

from service.errors import Forbidden, Unauthorized
from service.tokens import Principal, TokenBook

SCOPE_OF: dict[str, str] = {
    "v1.metrics.list_metrics": "view",
    "v1.metrics.get_metric": "view",
    "v1.metrics.put_metric": "manage",
    "v1.metrics.delete_metric": "manage",
    "v1.batches.add_batch": "feed",
    "v1.batches.list_batches": "view",
    "v1.batches.get_batch": "view",
    "v1.batches.delete_batch": "feed",
    "v1.fits.request_fit": "fit",
    "v1.fits.list_fits": "view",
    "v1.fits.get_fit": "view",
    "v1.fits.retry_fit": "fit",
    "v1.versions.list_versions": "view",
    "v1.versions.get_version": "view",
    "v1.versions.explain_version": "view",
    "v1.versions.activate": "release",
    "v1.versions.history": "view",
    "v1.groupings.group": "view",
    "v1.grouping_runs.start_run": "view",  # a grouping, only larger: the same scope
    "v1.grouping_runs.get_run": "view",
    "v1.grouping_runs.results": "view",
    "v1.grouping_runs.delete_run": "view",
    "v1.drift.drift_report": "view",
    "v1.queues.queues": "view",
    # the console's data parts (service/api/console.py); its frame and assets are open
    "console.parts.overview": "view",
    "console.parts.metric": "view",
}


def require_token() -> None:
    """``before_request`` hook: sets ``g.principal`` or raises a 401/403 problem."""
    header = request.headers.get("Authorization", "")
    scheme, _, presented = header.partition(" ")
    if scheme.lower() != "bearer" or not presented.strip():
        raise Unauthorized("Send 'Authorization: Bearer <token>'.")
    tokens: TokenBook = current_app.extensions["likewise.tokens"]
    who = tokens.find(presented.strip())
    if who is None:
        raise Unauthorized("The Bearer token is not valid.")
    g.principal = who
    if request.endpoint is None:  # no such route: the 404/405 handlers answer
        return
    scope = SCOPE_OF.get(request.endpoint)
    if scope is None or not who.may(scope):
        needed = scope or "an unknown scope"
        raise Forbidden(f"This token lacks the scope {needed!r} that this request needs.",
                        missing_scope=needed)
    args = request.view_args or {}
    metric = args.get("name")
    if metric is None and "fit_id" in args:
        metric = _metric_of_fit(str(args["fit_id"]))
    if metric is not None and not who.may_touch(str(metric)):
        raise Forbidden(f"This token may not touch metric {metric!r}.")


def _metric_of_fit(fit_id: str) -> str | None:
    from .deps import context

    fit = context().storage.fits.get(fit_id) if len(fit_id) <= 64 else None
    return fit.metric if fit is not None else None


def current() -> Principal:
    """The authenticated caller (only inside a ``/v1`` request)."""
    return g.principal


def principal() -> str:
    """The authenticated caller's name (only inside a ``/v1`` request)."""
    return current().name
