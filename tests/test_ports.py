"""The use cases' storage and queue interfaces (``service/usecases/ports.py``).

The Redis adapters must have every member a protocol lists, with the same parameters
(compared with ``inspect``), and the use cases may call nothing the protocols do not
list: their sources are read for every ``ctx.storage.<store>.<member>`` and
``ctx.jobs.<member>`` (following local names bound to them), and they never touch
``ctx.redis`` or ``ctx.queue``.
"""

from __future__ import annotations

import ast
import inspect
from pathlib import Path
from typing import Generic, Protocol

import pytest

from service import jobqueue
from service.context import Context
from service.store import Storage
from service.store.batches import BatchStore
from service.store.drift import DriftStore
from service.store.fits import FitStore
from service.store.idempotency import IdempotencyStore
from service.store.metrics import MetricStore
from service.store.runs import RunStore
from service.store.tallies import TallyStore
from service.store.versions import VersionStore
from service.usecases import ports

ROOT = Path(__file__).resolve().parents[1]
STORES = {"metrics": (ports.MetricStore, MetricStore),
          "batches": (ports.BatchStore, BatchStore),
          "versions": (ports.VersionStore, VersionStore),
          "fits": (ports.FitStore, FitStore),
          "drift": (ports.DriftStore, DriftStore),
          "tallies": (ports.TallyStore, TallyStore),
          "idempotency": (ports.IdempotencyStore, IdempotencyStore),
          "runs": (ports.RunStore, RunStore)}
PAIRS = [*STORES.values(), (ports.FitQueue, jobqueue.RQFitQueue)]


def members(protocol: type) -> set[str]:
    """Public members, those of the protocols it extends included."""
    return {n for c in protocol.__mro__ if c not in (Protocol, Generic, object)
            for n in vars(c) if not n.startswith("_")}


def _shape(fn: object) -> list[tuple[str, object, object]]:
    return [(p.name, p.kind, p.default) for p in inspect.signature(fn).parameters.values()]


@pytest.mark.parametrize("protocol,adapter", PAIRS, ids=[p.__name__ for p, _ in PAIRS])
def test_the_adapter_has_every_member_with_the_same_parameters(protocol, adapter) -> None:
    for name in sorted(members(protocol)):
        assert hasattr(adapter, name), f"{adapter.__name__} lacks {name}"
        assert _shape(getattr(adapter, name)) == _shape(getattr(protocol, name)), name


def test_the_storage_and_the_context_offer_the_protocols(ctx: Context) -> None:
    assert members(ports.Stores) == {*STORES, "answers"}
    assert isinstance(ctx.storage, Storage)
    for name, (_protocol, adapter) in STORES.items():
        assert isinstance(getattr(ctx.storage, name), adapter), name
    assert _shape(Storage.answers) == _shape(ports.Stores.answers)
    assert isinstance(ctx.jobs, jobqueue.RQFitQueue) and ctx.jobs is ctx.jobs
    assert ctx.jobs.job_id_for("f", 2) == jobqueue.job_id_for(ctx, "f", 2)


# ---- what the use cases call ---------------------------------------------------------
def _chain(node: ast.AST) -> tuple[str, ...] | None:
    parts: list[str] = []
    while isinstance(node, ast.Attribute):
        parts.append(node.attr)
        node = node.value
    return (node.id, *reversed(parts)) if isinstance(node, ast.Name) else None


def _pairs(node: ast.Assign) -> list[tuple[ast.AST, ast.AST]]:
    out: list[tuple[ast.AST, ast.AST]] = []
    for target in node.targets:
        if isinstance(target, ast.Tuple) and isinstance(node.value, ast.Tuple):
            out += zip(target.elts, node.value.elts, strict=True)
        else:
            out.append((target, node.value))
    return out


def calls(source: str) -> set[tuple[str, str]]:
    """``(store, member)`` for every storage member reached, ``("jobs", member)`` for the
    queue, ``("ctx", attr)`` for ``ctx.redis`` / ``ctx.queue``; local names bound to
    ``ctx.storage`` or one of its stores are followed."""
    tree = ast.parse(source)
    storage: set[tuple[str, ...]] = {("ctx", "storage")}
    stores: dict[tuple[str, ...], str] = {}
    for node in ast.walk(tree):
        if isinstance(node, ast.Assign):
            for target, value in _pairs(node):
                t, v = _chain(target), _chain(value)
                if t and v and v in storage:
                    storage.add(t)
                elif t and v and v[:-1] in storage and v[-1] in STORES:
                    stores[t] = v[-1]
    found: set[tuple[str, str]] = set()
    for node in ast.walk(tree):
        c = _chain(node) if isinstance(node, ast.Attribute) else None
        if c is None:
            continue
        if len(c) >= 3 and c[:-2] in storage and c[-2] in STORES:
            found.add((c[-2], c[-1]))
        elif c[:-1] in stores:
            found.add((stores[c[:-1]], c[-1]))
        elif c[:-1] in storage and c[-1] not in STORES:
            found.add(("storage", c[-1]))
        elif c[:2] == ("ctx", "jobs") and len(c) == 3:
            found.add(("jobs", c[2]))
        elif c in {("ctx", "redis"), ("ctx", "queue")}:
            found.add(("ctx", c[1]))
    return found


def test_the_scan_sees_through_local_names() -> None:
    src = ("st = ctx.storage\nst.fits.get(1)\nself.v, x = ctx.storage.versions, 2\n"
           "self.v.active('m')\nctx.storage.answers()\nctx.jobs.forget('j')\nctx.redis.ping()")
    assert calls(src) == {("fits", "get"), ("versions", "active"), ("storage", "answers"),
                          ("jobs", "forget"), ("ctx", "redis")}


def _allowed() -> set[tuple[str, str]]:
    out = {(name, m) for name, (protocol, _) in STORES.items() for m in members(protocol)}
    return out | {("storage", "answers")} | {("jobs", m) for m in members(ports.FitQueue)}


def test_use_cases_call_only_what_the_protocols_list() -> None:
    allowed, wrong, used = _allowed(), [], set()
    for path in sorted((ROOT / "service" / "usecases").glob("*.py")):
        for call in calls(path.read_text()):
            used.add(call)
            if call not in allowed:
                wrong.append(f"{path.name}: {'.'.join(call)}")
    assert not wrong, "\n".join(wrong)
    # and the protocols list nothing the service no longer calls (the retry guard of
    # the HTTP layer is the idempotency store's one caller)
    for path in sorted((ROOT / "service" / "api").glob("*.py")):
        used |= calls(path.read_text().replace("context().storage", "ctx.storage"))
    used |= {("idempotency", m) for m in ("claim", "fill", "release")}
    # fit_exec.Lease reaches the lease members through the store it is handed
    used |= {(store, m) for store in ("fits", "runs") for m in members(ports.LeaseStore)}
    assert allowed - used == set()


def test_use_cases_take_only_the_queues_words_from_its_module() -> None:
    """``service.jobqueue`` offers the use cases its types (job and worker states), not
    its functions: those are reached through ``ctx.jobs``."""
    for path in sorted((ROOT / "service" / "usecases").glob("*.py")):
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.ImportFrom) and node.module == "service.jobqueue":
                assert {a.name for a in node.names} <= {"JobState", "WorkerState",
                                                        "WorkerView"}, path.name
            if isinstance(node, ast.ImportFrom) and node.module == "service":
                assert "jobqueue" not in {a.name for a in node.names}, path.name
