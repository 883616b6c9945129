"""JSON log lines: one parseable object per record, with the fields a log collector indexes."""

from __future__ import annotations

import json
import logging
import subprocess
import sys
from pathlib import Path

import pytest
from pydantic import ValidationError

from expertloop.config import Settings
from expertloop.system.logs import JsonFormatter, logging_config

ROOT = Path(__file__).resolve().parents[2]


def _record(
    name: str, msg: str, args: tuple[object, ...] = (), **extra: object
) -> logging.LogRecord:
    record = logging.LogRecord(name, logging.WARNING, __file__, 10, msg, args, None)
    record.__dict__.update(extra)
    return record


def test_a_record_becomes_one_json_object_with_time_level_logger_and_message() -> None:
    record = _record("expertloop.jobs", "job %s lost to %s", (7, "worker-2"))
    record.created = 0.25  # 1970-01-01T00:00:00.250 UTC
    line = JsonFormatter().format(record)
    assert "\n" not in line
    assert json.loads(line) == {
        "time": "1970-01-01T00:00:00.250+00:00",
        "level": "WARNING",
        "logger": "expertloop.jobs",
        "message": "job 7 lost to worker-2",
    }


def test_extra_fields_are_kept_and_odd_values_do_not_lose_the_line() -> None:
    class Opaque:
        def __str__(self) -> str:
            return "opaque-value"

    entry = json.loads(
        JsonFormatter().format(_record("x", "hello", job_id=3, where=Opaque(), note="grüße"))
    )
    assert entry["job_id"] == 3 and entry["where"] == "opaque-value" and entry["note"] == "grüße"


def test_an_exception_is_one_field_with_its_traceback() -> None:
    try:
        1 / 0  # noqa: B018
    except ZeroDivisionError:
        record = logging.LogRecord("x", logging.ERROR, __file__, 1, "failed", (), sys.exc_info())
    entry = json.loads(JsonFormatter().format(record))
    assert entry["message"] == "failed"
    assert entry["exception"].startswith("Traceback (most recent call last)")
    assert entry["exception"].rstrip().endswith("ZeroDivisionError: division by zero")


def test_access_lines_get_method_path_and_status_fields() -> None:
    # the arguments uvicorn's access logger passes: client, method, path, HTTP version, status
    record = _record(
        "uvicorn.access",
        '%s - "%s %s HTTP/%s" %d',
        ("127.0.0.1:5000", "GET", "/readyz", "1.1", 503),
    )
    entry = json.loads(JsonFormatter().format(record))
    assert entry["message"] == '127.0.0.1:5000 - "GET /readyz HTTP/1.1" 503'
    assert (entry["method"], entry["path"], entry["status"]) == ("GET", "/readyz", 503)
    assert entry["client"] == "127.0.0.1:5000"


def _configured_output(log_format: str) -> str:
    # a fresh interpreter: dictConfig changes process-wide logging state
    code = (
        "import logging; from expertloop.system.logs import configure_logging; "
        f"configure_logging({log_format!r}); "
        "logging.getLogger('expertloop.worker').info('worker %s running', 'w1'); "
        "logging.getLogger('uvicorn.error').info('Started server process'); "
        "logging.getLogger('noisy').debug('hidden at INFO')"
    )
    done = subprocess.run(
        [sys.executable, "-c", code],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=60,
        check=True,
    )
    assert done.stdout == ""
    return done.stderr


def test_json_configuration_sends_our_and_uvicorn_records_as_json_lines_to_stderr() -> None:
    lines = _configured_output("json").splitlines()
    entries = [json.loads(line) for line in lines]
    assert [(e["logger"], e["message"]) for e in entries] == [
        ("expertloop.worker", "worker w1 running"),
        ("uvicorn.error", "Started server process"),
    ]


def test_text_configuration_writes_plain_lines() -> None:
    lines = _configured_output("text").splitlines()
    assert len(lines) == 2
    assert lines[0].endswith(" INFO expertloop.worker: worker w1 running")
    with pytest.raises(json.JSONDecodeError):
        json.loads(lines[0])


def test_log_format_setting_accepts_only_text_and_json() -> None:
    assert Settings.model_fields["log_format"].default == "text"
    assert Settings(log_format="json").log_format == "json"
    with pytest.raises(ValidationError):
        Settings(log_format="xml")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="'text' or 'json'"):
        logging_config("xml")  # type: ignore[arg-type]
