"""Grouping runs: a large table grouped by the workers (202 + Location), followed,
read back by pages (JSON, or an Arrow IPC stream when asked), dropped."""

from __future__ import annotations

from functools import partial

from flask import Blueprint, Response, request

from service import arrow_tables
from service.usecases import grouping_runs as uc
from service.usecases import pages

from .auth import principal
from .deps import context, no_content, reply
from .formats import read_table
from .idempotency import idempotent
from .schemas import GroupingQuerySchema, PageQuerySchema, Ruled, query_args

bp = Blueprint("grouping_runs", __name__)
NEXT_CURSOR = "Next-Cursor"  # the Arrow answer's next_cursor (absent on the last page)


class ResultsQuerySchema(PageQuerySchema):
    """A page of a run's results: longer pages than other lists allow."""

    limit = Ruled(partial(pages.check_limit, most=uc.MAX_RESULTS), query=True,
                  load_default=uc.DEFAULT_RESULTS)


def _where(name: str, run_id: str) -> str:
    return f"/v1/metrics/{name}/grouping-runs/{run_id}"


@bp.post("/metrics/<name>/grouping-runs")
@idempotent
def start_run(name: str) -> Response:
    s = context().settings
    table, options = read_table("grouping", GroupingQuerySchema(),
                                tabular_only=("k", "version"),
                                caps=(s.max_run_records, s.max_run_bytes))
    run = uc.start_run(context(), name, table, options.get("k"), options.get("version"),
                       ignore_extra=options["ignore_extra_columns"],
                       id_column=options.get("id_column"), requested_by=principal())
    return reply(run, 202, location=_where(name, run["run_id"]))


@bp.get("/metrics/<name>/grouping-runs/<run_id>")
def get_run(name: str, run_id: str) -> Response:
    return reply(uc.get_run(context(), name, run_id))


@bp.delete("/metrics/<name>/grouping-runs/<run_id>")
def delete_run(name: str, run_id: str) -> Response:
    uc.delete_run(context(), name, run_id)
    return no_content()


@bp.get("/metrics/<name>/grouping-runs/<run_id>/results")
def results(name: str, run_id: str) -> Response:
    query = query_args(ResultsQuerySchema())
    limit, cursor = query["limit"], query.get("cursor")
    best = request.accept_mimetypes.best_match(["application/json",
                                                arrow_tables.ARROW_STREAM])
    if best != arrow_tables.ARROW_STREAM:
        return reply(uc.results_page(context(), name, run_id, limit, cursor))
    cols = uc.result_columns(context(), name, run_id, limit, cursor)
    n = len(cols["labels"])
    body = {"record": range(cols["start"], cols["start"] + n), "label": cols["labels"],
            "distance": cols["distances"], "margin": cols["margins"]}
    if cols["ids"] is not None:
        body["id"] = cols["ids"]
    resp = Response(arrow_tables.stream(body), mimetype=arrow_tables.ARROW_STREAM)
    if cols["next_cursor"]:
        resp.headers[NEXT_CURSOR] = cols["next_cursor"]
    return resp
