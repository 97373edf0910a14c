"""The queue library's log sentences stay behind our words: a real ``likewise worker
--until-empty`` process, and the filter's rules one by one. Data: scikit-learn's
bundled iris (Fisher 1936)."""

from __future__ import annotations

import io
import json
import logging
import os
import subprocess
import sys
from pathlib import Path

import pytest

from service import logs
from service.context import Context
from service.usecases import fits
from service.usecases.params import FitParams
from tests.service._data import setup_metric
from workers.logwords import WORDS, QueueWords

ROOT = Path(__file__).resolve().parents[2]
# RQ's own sentences as its worker logs them (rq 3.0, rq/worker/base.py)
RQ_SENTENCES = ("Job OK", "cleaning registries", "*** Listening on", "started with PID",
                "done, quitting", "result is kept", "Successfully completed", "Worker rq:",
                "subscribing to channel", "unsubscribing from channel", "rq.worker")


def _env(ctx: Context, **extra: str) -> dict[str, str]:
    s = ctx.settings
    return {**os.environ, "PYTHONPATH": str(ROOT), "LIKEWISE_REDIS_URL": s.redis_url,
            "LIKEWISE_KEY_PREFIX": s.key_prefix, "LIKEWISE_QUEUE": s.queue_name, **extra}


def test_a_worker_run_logs_in_our_words_only(ctx: Context) -> None:
    setup_metric(ctx, "m", n=3)
    fit, _ = fits.request_fit(ctx, "m", FitParams.parse({}), "admin")
    name = f"{ctx.settings.key_prefix}-words"
    proc = subprocess.run(
        [sys.executable, "-m", "service.cli", "worker", "--until-empty", "--name", name],
        env=_env(ctx, LIKEWISE_LOG_FORMAT="json"), cwd=ROOT, timeout=120,
        capture_output=True, text=True)
    out = proc.stdout + proc.stderr
    assert proc.returncode == 0, out[-3000:]
    assert fits.get_fit(ctx, fit["fit_id"])["status"] == "succeeded"  # ran, then exited
    lines = [json.loads(line) for line in out.splitlines()]
    said = [(line["message"], line.get("fit_id")) for line in lines]
    for words in ("fit job taken", "fit job ended"):
        assert (words, fit["fit_id"]) in said, said
    assert ("fit worker stopping: no fit left to run", None) in said
    for sentence in RQ_SENTENCES:
        assert sentence not in out, sentence


def _record(name: str, level: int, msg: str, args: tuple) -> logging.LogRecord:
    return logging.LogRecord(name, level, __file__, 1, msg, args, None)


SAMPLE_ARGS = {"Worker %s: %s: %s (%s)": ("w1", "q", "\x1b[34mJob OK\x1b[0m",
                                          "p-fit-0123456789abcdef0123-1")}


@pytest.mark.parametrize("template", sorted(WORDS))
def test_every_known_sentence_is_said_in_our_words(template: str) -> None:
    args = SAMPLE_ARGS.get(template) or tuple(
        "p-fit-0123456789abcdef0123-1" if i else "w1" for i in range(template.count("%")))
    record = _record("rq.worker", logging.INFO, template, args)
    assert QueueWords().filter(record)
    message = record.getMessage()
    assert message != template and "%" not in message and "Job OK" not in message
    assert record.name == "likewise.worker"


def test_other_queue_records_are_lowered_or_worded() -> None:
    info = _record("rq.worker", logging.INFO, "Worker %s: cleaning registries for queue: %s",
                   ("w1", "q"))
    assert not QueueWords().filter(info) and info.levelno == logging.DEBUG  # root at INFO
    warning = _record("rq.queue", logging.WARNING, "Something odd about %s", ("q",))
    assert QueueWords().filter(warning)
    assert (warning.getMessage(), warning.detail) == (
        "the fit queue reported a problem", "Something odd about q")
    ours = _record("likewise.http", logging.INFO, "GET / 200", ())
    assert QueueWords().filter(ours) and ours.getMessage() == "GET / 200"


@pytest.mark.parametrize("fmt", ["json", "text"])
def test_the_log_format_is_chosen_by_the_environment(fmt: str) -> None:
    assert logs.log_format({"LIKEWISE_LOG_FORMAT": fmt.upper()}) == fmt
    with pytest.raises(ValueError, match="json or text"):
        logs.log_format({"LIKEWISE_LOG_FORMAT": "xml"})
    assert logs.log_format({}, stream=io.StringIO()) == "json"  # not a terminal


def test_a_json_line_carries_time_level_logger_message_and_fields() -> None:
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(logs.json_formatter())
    record = _record("likewise.http", logging.INFO, "GET %s 200", ("/healthz",))
    record.request_id = "abc"
    handler.handle(record)
    line = json.loads(stream.getvalue())
    assert {k: line[k] for k in ("level", "logger", "message", "request_id")} == {
        "level": "INFO", "logger": "likewise.http", "message": "GET /healthz 200",
        "request_id": "abc"}
    assert line["time"].endswith("+00:00")
    text = logs.TextFormatter().format(record)
    assert text.endswith("INFO likewise.http: GET /healthz 200 [abc]")
