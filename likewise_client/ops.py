"""Operator commands of ``likewise``, over the HTTP API through :class:`Client`.

``metrics``, ``versions``, ``explain``, ``activate``, ``rollback``, ``queue``, ``follow``
and ``prune`` (see ``likewise COMMAND --help``). They talk to the service at
``--url`` (else ``LIKEWISE_URL``, else ``http://$LIKEWISE_HOST:$LIKEWISE_PORT``, default
``http://127.0.0.1:8000``) with the token ``--token`` (else ``LIKEWISE_TOKEN``, else
``LIKEWISE_ADMIN_TOKEN``, else the admin token file ``$LIKEWISE_DATA_DIR/admin-token``
that ``likewise run`` writes, ``./var`` by default). Never Redis directly.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from collections.abc import Callable, Sequence
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, TextIO

from .client import ENDED, Client, fit_progress_bar
from .errors import ClientError

WATCH_MIN, WATCH_MAX = 0.5, 60.0  # seconds between queue refreshes
BAR = 24  # characters of the widest weight bar


def default_url(env: os._Environ[str] | dict[str, str] = os.environ) -> str:
    if env.get("LIKEWISE_URL"):
        return env["LIKEWISE_URL"]
    return (f"http://{env.get('LIKEWISE_HOST') or '127.0.0.1'}:"
            f"{env.get('LIKEWISE_PORT') or '8000'}")


def default_token(env: os._Environ[str] | dict[str, str] = os.environ) -> str | None:
    for name in ("LIKEWISE_TOKEN", "LIKEWISE_ADMIN_TOKEN"):
        if env.get(name):
            return env[name]
    path = Path(env.get("LIKEWISE_DATA_DIR") or "var") / "admin-token"
    return path.read_text().strip() if path.is_file() else None


def table(headers: Sequence[str], rows: Sequence[Sequence[Any]], out: TextIO) -> None:
    """A plain aligned table; numbers right-aligned."""
    cells = [[_cell(v) for v in row] for row in rows]
    widths = [max([len(h)] + [len(r[i]) for r in cells]) for i, h in enumerate(headers)]
    numeric = [all(_is_number(row[i]) for row in rows) and bool(rows)
               for i in range(len(headers))]

    def line(values: Sequence[str]) -> str:
        return "  ".join(v.rjust(w) if num else v.ljust(w)
                         for v, w, num in zip(values, widths, numeric, strict=True)).rstrip()

    print(line(list(headers)), file=out)
    print(line(["-" * w for w in widths]), file=out)
    for row in cells:
        print(line(row), file=out)


def _is_number(v: Any) -> bool:
    if isinstance(v, str):  # a number formatted by the caller
        try:
            float(v)
        except ValueError:
            return False
        return True
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _cell(v: Any) -> str:
    if v is None:
        return "-"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        return f"{v:.3f}"
    return str(v)


def parse_when(text: str) -> datetime:
    """A date (``2026-01-31``, midnight UTC) or an ISO 8601 time; no zone means UTC."""
    value = text.strip()
    if value.endswith(("Z", "z")):
        value = value[:-1] + "+00:00"
    try:
        when = datetime.fromisoformat(value)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a date (2026-01-31) or an ISO 8601 time") from None
    return when if when.tzinfo else when.replace(tzinfo=timezone.utc)


# ---------------------------------------------------------------- commands
def cmd_metrics(lw: Client, args: argparse.Namespace, out: TextIO) -> int:
    rows = [(m["name"], len(m["features"]), m["batches"], m["records"], m["versions"],
             m["active_version"]) for m in lw.list_metrics()]
    if not rows:
        print("no metrics", file=out)
        return 0
    table(["metric", "features", "batches", "records", "versions", "active"], rows, out)
    return 0


def cmd_versions(lw: Client, args: argparse.Namespace, out: TextIO) -> int:
    versions = lw.list_versions(args.metric)
    if not versions:
        print(f"{args.metric}: no versions yet (fit it first)", file=out)
        return 0
    rows = [("*" if v["active"] else "", v["version"], v["method"], v["rank"], f"{v['alpha']:g}",
             v["score"]["ari"], v["score"]["baseline_ari"], v["beats_baseline"],
             v["created_at"]) for v in versions]
    table(["", "version", "method", "rank", "alpha", "held-out ARI", "Euclidean ARI",
           "beats Euclidean", "created"], rows, out)
    return 0


def cmd_drift(lw: Client, args: argparse.Namespace, out: TextIO) -> int:
    report = lw.drift(args.metric, version=args.version, since=args.since)
    print(f"{args.metric} version {report['version']}: {report['verdict']} — "
          f"{report['records']} records grouped since {report['since']} "
          f"(training reference: {report['reference_records']} records)", file=out)
    rows = [(name, s.get("verdict"), s.get("mean_shift"), s["psi"], s["ks"])
            for name, s in report["features"].items()]
    m = report["margins"]
    rows.append(("(margins)", m.get("verdict"), m.get("mean_shift"), m["psi"], m["ks"]))
    table(["feature", "verdict", "mean shift (sd)", "PSI", "KS"], rows, out)
    print(f"margins scored against: {margin_reference(report)}", file=out)
    if report["flagged"]:
        print("flagged: " + ", ".join(report["flagged"]), file=out)
    return 0


def margin_reference(report: dict[str, Any]) -> str:
    """What a drift report's margins were scored against, in words."""
    if report["margins"].get("reference") == "held_out":
        return (f"the training batches held out in cross-validation "
                f"({report.get('reference_heldout_batches')} batches, each grouped by a "
                "map fitted without it)")
    return "the training batches grouped by the version itself (in sample; fitted " \
        "before held-out references)"


def feature_weights(explanation: dict[str, Any]) -> list[tuple[str, float, float]]:
    """``(feature, share, per_unit)`` from the service's explanation, largest share
    first: ``share`` is ``M_jj / tr(M)`` (standardised features), ``per_unit`` the
    learned distance one unit of the feature adds by itself (docs/method.md)."""
    rows = [(name, f["share"], f["weight"]) for name, f in explanation["features"].items()]
    return sorted(rows, key=lambda item: -item[1])


def cmd_explain(lw: Client, args: argparse.Namespace, out: TextIO) -> int:
    number = args.version
    if number is None:
        number = lw.get_metric(args.metric)["active_version"]
        if number is None:
            print(f"{args.metric}: no active version", file=sys.stderr)
            return 1
    v = lw.get_version(args.metric, number)
    ex = lw.explain(args.metric, number)
    score = v["score"]
    print(f"{args.metric} version {v['version']}{' (active)' if v['active'] else ''}: "
          f"{v['method']}, rank {v['rank']}, alpha {v['alpha']:g}", file=out)
    if v["report"].get("summary"):
        print(v["report"]["summary"], file=out)
    print(f"held-out ARI {score['ari']:.3f} against Euclidean {score['baseline_ari']:.3f}"
          f" ({'beats' if v['beats_baseline'] else 'does not beat'} it)\n", file=out)
    weights = feature_weights(ex)
    top = max((share for _, share, _ in weights), default=0.0) or 1.0
    rows = [(name, share, f"{per_unit:.3g}", "#" * round(BAR * share / top))
            for name, share, per_unit in weights]
    table(["feature", "share", "per unit", ""], rows, out)
    if ex["folds"]:
        print("", file=out)
        table(["fold", "repeat", "batches scored", "held-out ARI", "Euclidean ARI"],
              [(f["fold"], f["repeat"], f["scored_batches"], f["ari"], f["baseline_ari"])
               for f in ex["folds"]], out)
    return 0


def cmd_activate(lw: Client, args: argparse.Namespace, out: TextIO) -> int:
    moved = lw.activate(args.metric, args.version, args.reason)
    print(f"{args.metric}: version {moved['previous_version']} -> "
          f"{moved['active_version']} ({args.reason})", file=out)
    return 0


def cmd_rollback(lw: Client, args: argparse.Namespace, out: TextIO) -> int:
    active = lw.get_metric(args.metric)["active_version"]
    into = [h for h in lw.history(args.metric) if h["to"] == active]
    back = into[-1]["from"] if into else None
    if back is None:
        print(f"{args.metric}: nothing to roll back to (version {active} was the first "
              "active one)", file=sys.stderr)
        return 1
    args.version = back
    return cmd_activate(lw, args, out)


def _queue_lines(overview: dict[str, Any], out: TextIO) -> None:
    table(["queue", "waiting", "fitting", "failed", "done", "oldest wait s"],
          [(q["name"], q["waiting"], q["fitting"], q["failed"], q["done"],
            q["oldest_waiting_seconds"]) for q in overview["queues"]], out)
    print(file=out)
    workers = overview["workers"]
    if workers:
        table(["worker", "state", "fit", "last heartbeat"],
              [(w["name"], w["state"], w["current_fit"], w["last_heartbeat"])
               for w in workers], out)
    else:
        print("no workers", file=out)


def cmd_queue(lw: Client, args: argparse.Namespace, out: TextIO,
              sleep: Callable[[float], None] = time.sleep) -> int:
    interval = min(WATCH_MAX, max(WATCH_MIN, args.interval))
    shown = 0
    try:
        while True:
            overview = lw.queues()
            if out.isatty():
                print("\x1b[H\x1b[2J", end="", file=out)  # clear the screen
            stamp = datetime.now(timezone.utc).strftime("%H:%M:%S")
            print(f"fit queue at {stamp} UTC (every {interval:g}s; Ctrl-C stops)", file=out)
            _queue_lines(overview, out)
            out.flush()
            shown += 1
            if args.times and shown >= args.times:
                return 0
            print(file=out)
            sleep(interval)
    except KeyboardInterrupt:
        return 0


def cmd_follow(lw: Client, args: argparse.Namespace, out: TextIO) -> int:
    with fit_progress_bar(args.fit_id) as show:
        fit = lw.wait_for_fit(args.fit_id, timeout=args.timeout, on_progress=show,
                              interval=args.interval)
    assert fit["status"] in ENDED
    if fit["status"] != "succeeded":
        print(f"fit {fit['fit_id']} failed: {fit.get('error')}", file=out)
        return 1
    decision = fit.get("decision") or {}
    print(f"fit {fit['fit_id']} succeeded: version {fit['version']} of {fit['metric']}"
          f"{' (activated)' if decision.get('activated') else ''}"
          f"{': ' + decision['reason'] if decision.get('reason') else ''}", file=out)
    return 0


def cmd_prune(lw: Client, args: argparse.Namespace, out: TextIO) -> int:
    before: datetime = args.before
    old = [b for b in lw.list_batches(args.metric) if parse_when(b["created_at"]) < before]
    when = before.isoformat().replace("+00:00", "Z")
    if not old:
        print(f"{args.metric}: no batches created before {when}", file=out)
        return 0
    table(["batch", "records", "groups", "created"],
          [(b["batch_id"], b["records"], b["groups"], b["created_at"]) for b in old], out)
    if args.dry_run:
        print(f"dry run: would delete {len(old)} batches of {args.metric} created before "
              f"{when}", file=out)
        return 0
    for b in old:
        lw.delete_batch(args.metric, b["batch_id"])
    print(f"deleted {len(old)} batches of {args.metric} created before {when}", file=out)
    return 0


# ---------------------------------------------------------------- wiring
def _with_client(command: Callable[..., int]) -> Callable[[argparse.Namespace], int]:
    def run(args: argparse.Namespace) -> int:
        token = args.token or default_token()
        if not token:
            print("likewise: no token: pass --token or set LIKEWISE_TOKEN", file=sys.stderr)
            return 2
        try:
            with Client(args.url or default_url(), token) as lw:
                return command(lw, args, sys.stdout)
        except ClientError as exc:
            print(f"likewise {args.command}: {exc}", file=sys.stderr)
            return 1

    return run


def add_commands(sub: argparse._SubParsersAction) -> None:
    """Register the operator commands on the ``likewise`` parser's subcommands."""
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--url", default=None,
                        help="service URL (default $LIKEWISE_URL, else "
                             "http://$LIKEWISE_HOST:$LIKEWISE_PORT, else :8000 locally)")
    common.add_argument("--token", default=None,
                        help="Bearer token (default $LIKEWISE_TOKEN, $LIKEWISE_ADMIN_TOKEN, "
                             "or $LIKEWISE_DATA_DIR/admin-token)")

    def add(name: str, command: Callable[..., int], text: str) -> argparse.ArgumentParser:
        p = sub.add_parser(name, parents=[common], help=text, description=text)
        p.set_defaults(func=_with_client(command))
        return p

    add("metrics", cmd_metrics, "list metrics: batches, records, versions, active version")
    p = add("versions", cmd_versions, "list a metric's versions and their held-out scores")
    p.add_argument("metric")
    p = add("explain", cmd_explain, "show a version's feature weights, by feature name")
    p.add_argument("metric")
    p.add_argument("version", nargs="?", type=int, help="default: the active version")
    p = add("drift", cmd_drift, "how far recent groupings' records are from the training "
                                "batches, by feature")
    p.add_argument("metric")
    p.add_argument("--version", type=int, default=None, help="default: the active version")
    p.add_argument("--since", default=None, help="an ISO 8601 time (default: all retained)")
    p = add("activate", cmd_activate, "make a version the active one (reason required)")
    p.add_argument("metric")
    p.add_argument("version", type=int)
    p.add_argument("--reason", required=True, help="recorded in the activation history")
    p = add("rollback", cmd_rollback,
            "activate the version that was active before the current one (reason required)")
    p.add_argument("metric")
    p.add_argument("--reason", required=True, help="recorded in the activation history")
    p = add("queue", cmd_queue, "watch the fit queue and workers live (Ctrl-C stops)")
    p.add_argument("--interval", type=float, default=2.0,
                   help=f"seconds between refreshes, {WATCH_MIN:g} to {WATCH_MAX:g}")
    p.add_argument("--times", type=int, default=0, help="stop after this many refreshes")
    p = add("follow", cmd_follow, "follow a fit with a progress bar until it ends")
    p.add_argument("fit_id")
    p.add_argument("--timeout", type=float, default=1800.0, help="give up after (s)")
    p.add_argument("--interval", type=float, default=0.5, help="seconds between polls")
    p = add("prune", cmd_prune, "delete a metric's batches created before a date (retention)")
    p.add_argument("metric")
    p.add_argument("--before", type=parse_when, required=True,
                   help="a date (2026-01-31, midnight UTC) or an ISO 8601 time")
    p.add_argument("--dry-run", action="store_true", help="list what would go; delete nothing")
