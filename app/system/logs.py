"""Process logging for `serve` and `worker`: readable text lines, or one JSON object per line.

JSON lines let a log collector index fields (level, logger, HTTP status) without parsing text.
Only the standard library is used; uvicorn's own loggers are routed through the same handler.
"""

from __future__ import annotations

import json
import logging
import logging.config
from datetime import UTC, datetime
from typing import Any, Literal

LogFormat = Literal["text", "json"]

TEXT_FORMAT = "%(asctime)s %(levelname)s %(name)s: %(message)s"

# Attributes every LogRecord has; anything else on a record came from `extra=` and is kept.
_RECORD_ATTRIBUTES = frozenset(logging.LogRecord("", 0, "", 0, "", (), None).__dict__) | {
    "message",
    "asctime",
    "taskName",
}


class JsonFormatter(logging.Formatter):
    """Format a record as one JSON object: time (UTC, ISO 8601), level, logger, message.

    Fields given with `extra=` are added under their own names; an exception's traceback goes
    under "exception". uvicorn's access lines also get client, method, path and status fields.
    """

    def format(self, record: logging.LogRecord) -> str:
        entry: dict[str, Any] = {
            "time": datetime.fromtimestamp(record.created, tz=UTC).isoformat(
                timespec="milliseconds"
            ),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        if record.name == "uvicorn.access" and isinstance(record.args, tuple):
            if len(record.args) == 5:  # uvicorn passes (client, method, path, http version, status)
                client, method, path, _, status = record.args
                entry.update(client=client, method=method, path=path, status=status)
        for key, value in record.__dict__.items():
            if key not in _RECORD_ATTRIBUTES and key not in entry:
                entry[key] = value
        if record.exc_info:
            entry["exception"] = self.formatException(record.exc_info)
        if record.stack_info:
            entry["stack"] = self.formatStack(record.stack_info)
        # default=str: a stray object in `extra` must not cost the log line
        return json.dumps(entry, ensure_ascii=False, default=str)


def logging_config(log_format: LogFormat, level: str = "INFO") -> dict[str, Any]:
    """A `logging.config.dictConfig` dictionary: our loggers and uvicorn's, to stderr."""
    if log_format == "json":
        formatter: dict[str, Any] = {"()": "expertloop.system.logs.JsonFormatter"}
    elif log_format == "text":
        formatter = {"format": TEXT_FORMAT}
    else:
        raise ValueError(f"log format must be 'text' or 'json', got {log_format!r}")
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "formatters": {"expertloop": formatter},
        "handlers": {
            "stderr": {
                "class": "logging.StreamHandler",
                "formatter": "expertloop",
                "stream": "ext://sys.stderr",
            }
        },
        "loggers": {
            "uvicorn": {"handlers": ["stderr"], "level": level, "propagate": False},
            "uvicorn.error": {"level": level},
            "uvicorn.access": {"handlers": ["stderr"], "level": level, "propagate": False},
            # alembic logs its set-up at INFO whenever /readyz reads the schema revision
            "alembic": {"level": "WARNING"},
        },
        "root": {"handlers": ["stderr"], "level": level},
    }


def configure_logging(log_format: LogFormat, level: str = "INFO") -> None:
    """Configure this process's logging (the worker; uvicorn applies the same dict itself)."""
    logging.config.dictConfig(logging_config(log_format, level))
