"""A robot log upload as a validated StepBatch: unpack, read through the loop's log mapping,
and validate with the rules every rollout file meets, naming topic, field and time."""

from __future__ import annotations

from pathlib import Path

from ...errors import InvalidInput
from ...loops.log_mapping import LogMapping
from ...loops.spec import LoopSpec
from ..columns import CellError
from ..limits import UploadLimits
from ..validate import DEFAULT_LIMITS, StepBatch, validate
from .archive import bag_path, log_stem
from .reader import describe_time, open_bag
from .steps import MappedLog, map_log


def loop_mapping(slug: str, log_mapping: LogMapping | None) -> LogMapping:
    """The loop's log mapping, or a refusal saying the loop has none."""
    if log_mapping is None:
        raise InvalidInput(
            f"loop '{slug}' has no log mapping, so it cannot read robot logs; give the loop a "
            "`log_mapping` (README, 'Robot logs') or upload Parquet, .npz or JSON Lines"
        )
    return log_mapping


def default_control(round_number: int) -> str:
    """Who drove where the mapping names no mode topic: the expert in round 0, else the learner."""
    return "expert" if round_number == 0 else "learner"


def validate_log(
    path: Path,
    *,
    file_format: str,
    filename: str,
    mapping: LogMapping,
    spec: LoopSpec,
    round_number: int,
    spool_dir: Path,
    max_unpacked_bytes: int,
    limits: UploadLimits = DEFAULT_LIMITS,
) -> StepBatch:
    """Read a bag through the mapping and validate it like any rollout file."""
    with (
        bag_path(path, file_format, spool_dir, max_unpacked_bytes) as bag_file,
        open_bag(bag_file) as bag,
    ):
        mapped = map_log(
            bag,
            mapping,
            stem=log_stem(filename),
            default_control=default_control(round_number),
        )
    return check_mapped(mapped, spec, round_number=round_number, limits=limits)


def check_mapped(
    mapped: MappedLog,
    spec: LoopSpec,
    *,
    round_number: int,
    limits: UploadLimits = DEFAULT_LIMITS,
) -> StepBatch:
    """Validate a mapped log with the rules of every rollout file, naming the log's places."""
    if mapped.table is None:
        dropped = "; ".join(f"{n} steps without {s}" for s, n in mapped.dropped.items())
        short = mapped.short_segments
        raise InvalidInput(
            f"the log maps to no steps ({mapped.grid_steps} on the grid"
            + (f", dropped: {dropped}" if dropped else "")
            + (f", {short} segments shorter than min_steps" if short else "")
            + ")"
        )
    try:
        return validate(mapped.table, spec, round_number=round_number, limits=limits)
    except CellError as exc:
        raise InvalidInput(_place(exc, mapped)) from exc
    except InvalidInput as exc:
        raise InvalidInput(f"robot log: {exc.message}") from exc


def _place(error: CellError, mapped: MappedLog) -> str:
    """A row refusal restated as the log's topic, field and time."""
    source = mapped.column_sources.get(error.column, error.column)
    # a continuous action's refusal starts with its dimension: name that dimension's source
    dimension = error.reason.split(" = ", 1)[0]
    source = mapped.column_sources.get(f"{error.column}:{dimension}", source)
    when = describe_time(int(mapped.row_time_ns[error.row]), mapped.start_ns)
    return (
        f"{source}, at {when}, rollout '{mapped.row_key[error.row]}': "
        f"{error.column}: {error.reason}"
    )
