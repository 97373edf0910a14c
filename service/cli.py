"""The ``likewise`` command: ``run`` (everything), ``worker`` (one fit worker), ``demo``,
and the operator commands over the HTTP API (``likewise_client/ops.py``: ``metrics``,
``versions``, ``explain``, ``activate``, ``rollback``, ``queue``, ``follow``, ``prune``)."""

from __future__ import annotations

import argparse
import sys


def _cmd_run(_args: argparse.Namespace) -> int:
    from .config import Settings
    from .launcher import run
    from .logs import configure

    configure()
    return run(Settings.from_env())


def _cmd_worker(args: argparse.Namespace) -> int:
    from workers.worker import run_worker

    from .config import Settings
    from .logs import configure

    settings = Settings.from_env()
    if not settings.redis_url:
        print("likewise worker: set LIKEWISE_REDIS_URL", file=sys.stderr)
        return 2
    configure()
    run_worker(settings, burst=args.until_empty, name=args.name, logging_level="INFO")
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    from .demo import DemoError, run_demo

    try:
        return run_demo(url=args.url, token=args.token, weeks=args.weeks, seed=args.seed)
    except DemoError as exc:
        print(f"likewise demo: {exc}", file=sys.stderr)
        return 1


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="likewise",
        description="Learn from hand-grouped batches how to group records the way analysts do.",
    )
    sub = parser.add_subparsers(dest="command", required=True)
    p_run = sub.add_parser("run", help="start Redis (embedded unless given), workers and the API")
    p_run.set_defaults(func=_cmd_run)
    p_worker = sub.add_parser("worker", help="start one fit worker (needs LIKEWISE_REDIS_URL)")
    p_worker.add_argument("--name", default=None, help="worker name shown in /v1/queues")
    p_worker.add_argument("--until-empty", action="store_true",
                          help="run the fits waiting now, then exit once none is left")
    p_worker.set_defaults(func=_cmd_worker)
    p_demo = sub.add_parser(
        "demo", help="post the invented cold-chain scenario to a running service"
    )
    p_demo.add_argument("--url", default=None, help="service URL (default from LIKEWISE_HOST/PORT)")
    p_demo.add_argument("--token", default=None, help="Bearer token (default: the admin token)")
    p_demo.add_argument("--weeks", type=int, default=16, help="labelled batches to post")
    p_demo.add_argument("--seed", type=int, default=7, help="seed of the invented data")
    p_demo.set_defaults(func=_cmd_demo)
    from likewise_client.ops import add_commands

    add_commands(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    return int(args.func(args) or 0)


if __name__ == "__main__":
    sys.exit(main())
