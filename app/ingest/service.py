"""Store access for ingest: accept a validated rollout file in one transaction, read steps back."""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from sqlalchemy import insert, select
from sqlalchemy.exc import IntegrityError, InterfaceError, OperationalError
from sqlalchemy.orm import Session

from ..db import write_transaction
from ..errors import Conflict
from ..limits import shown
from ..loops.models import Loop, Round
from ..loops.spec import spec_of
from ..shared.encode import rows_to_bytes
from . import bulk, image_store
from .columns import Vectors
from .formats import detect_format
from .image_store import PackWrite
from .limits import UploadLimits
from .logs.archive import BAG_FORMATS, DEFAULT_MAX_UNPACKED_BYTES
from .logs.service import loop_mapping, validate_log
from .models import Rollout, Upload
from .staging import StagedUpload, stage_file
from .validate import DEFAULT_LIMITS, StepBatch


@dataclass
class UploadOutcome:
    """What an upload stored: new rollouts, and those already stored by an earlier upload."""

    upload_id: int
    duplicate_file: bool
    n_steps: int
    rollouts: list[dict[str, object]] = field(default_factory=list)
    already_stored: list[str] = field(default_factory=list)


def check_upload_target(session: Session, *, loop: Loop, rnd: Round) -> None:
    """Refuse an upload to a closed round (409) before the file is spooled; the read transaction
    that found the loop and round ends here, so nothing is held while the file is copied."""
    _require_open(loop, rnd)
    session.commit()


def _require_open(loop: Loop, rnd: Round) -> None:
    if rnd.status == "closed":
        raise Conflict(f"round {rnd.number} of '{loop.slug}' is closed and takes no uploads")


def ingest_file(
    session: Session,
    *,
    loop: Loop,
    rnd: Round,
    path: Path,
    filename: str,
    file_sha256: str,
    user_id: int | None,
    blob_dir: Path,
    limits: UploadLimits = DEFAULT_LIMITS,
    max_unpacked_bytes: int = DEFAULT_MAX_UNPACKED_BYTES,
) -> UploadOutcome:
    """Validate a spooled rollout file or robot log and store it all-or-nothing.

    The file is read and validated, and its images hashed, with no transaction open, so on
    SQLite no other writer waits for it; only storing takes the write lock. The images not
    stored yet go into one pack under `blob_dir` (image_store), deleted again when the
    transaction rolls back. The same file sent twice at once is stored once:
    on SQLite the second finds the first's upload under the write lock; on PostgreSQL the unique
    constraint stops the second, which then answers as the repeat it is.
    """
    _require_open(loop, rnd)
    earlier = _earlier_upload(session, rnd, file_sha256)
    if earlier is not None:
        return _outcome_of(session, earlier, duplicate_file=True)
    session.commit()  # end the read: parsing below may take seconds

    file_format = detect_format(path, filename)
    batch: StepBatch | StagedUpload
    if file_format in BAG_FORMATS:
        batch = validate_log(
            path,
            file_format=file_format,
            filename=filename,
            mapping=loop_mapping(loop.slug, spec_of(loop).log_mapping),
            spec=spec_of(loop),
            round_number=rnd.number,
            spool_dir=path.parent,
            max_unpacked_bytes=max_unpacked_bytes,
            limits=limits,
        )
    else:
        # Rollout files stream through a staging folder in bounded memory (app/ingest/staging).
        batch = stage_file(path, file_format, spec_of(loop), round_number=rnd.number, limits=limits)
    try:
        return _store_validated(
            session, loop, rnd, batch, filename, file_format, file_sha256, user_id, blob_dir
        )
    finally:
        if isinstance(batch, StagedUpload):
            batch.close()


def _store_validated(
    session: Session,
    loop: Loop,
    rnd: Round,
    batch: StepBatch | StagedUpload,
    filename: str,
    file_format: str,
    file_sha256: str,
    user_id: int | None,
    blob_dir: Path,
) -> UploadOutcome:
    """Store a validated upload in one write transaction (see ingest_file)."""
    hashes = rollout_hashes(batch)
    for attempt in range(2):
        pack: PackWrite | None = None
        try:
            with write_transaction(session):
                earlier = _earlier_upload(session, rnd, file_sha256)
                if earlier is not None:
                    return _outcome_of(session, earlier, duplicate_file=True)
                keep = _new_rollouts(session, loop, batch, hashes)
                upload, pack = _store(
                    session,
                    loop,
                    rnd,
                    batch,
                    hashes,
                    keep,
                    filename,
                    file_format,
                    file_sha256,
                    user_id,
                    blob_dir,
                )
            break
        except IntegrityError:
            # PostgreSQL: another upload stored this file, or one of its rollouts, while this
            # one was storing. Look again: the file is then a repeat, a rollout is skipped if
            # identical and refused if not. SQLite never gets here (one writer at a time).
            _discard(pack)
            if attempt == 1:
                raise
        except (OperationalError, InterfaceError):
            # The store failed or went away, perhaps during the commit, whose outcome is then
            # unknown: the pack stays, as its rows may have been committed (a pack no row names
            # is never read, app/ingest/image_store.py).
            raise
        except BaseException:
            _discard(pack)  # rolled back: no row names the pack
            raise
    outcome = _outcome_of(session, upload, duplicate_file=False)
    outcome.already_stored = [
        k for k, kept in zip(batch.rollout_keys, keep, strict=True) if not kept
    ]
    return outcome


def _discard(pack: PackWrite | None) -> None:
    if pack is not None:
        pack.discard()


def _earlier_upload(session: Session, rnd: Round, file_sha256: str) -> Upload | None:
    return session.scalar(
        select(Upload).where(Upload.round_id == rnd.id, Upload.file_sha256 == file_sha256)
    )


def _new_rollouts(
    session: Session, loop: Loop, batch: StepBatch | StagedUpload, hashes: list[str]
) -> np.ndarray:
    """Which of the batch's rollouts are new; a stored key with other content is a conflict."""
    stored = dict(
        session.execute(
            select(Rollout.key, Rollout.content_sha256).where(
                Rollout.loop_id == loop.id, Rollout.key.in_(batch.rollout_keys)
            )
        ).all()
    )
    clash = [
        k for k, h in zip(batch.rollout_keys, hashes, strict=True) if k in stored and stored[k] != h
    ]
    if clash:
        raise Conflict(
            f"rollout key '{shown(clash[0])}' is already stored with different steps; "
            "a rollout key names one run: give this run a new key"
        )
    return np.array([k not in stored for k in batch.rollout_keys], dtype=bool)


def rollout_hashes(batch: StepBatch | StagedUpload) -> list[str]:
    """SHA-256 of each rollout's canonical content (rows in step order)."""
    if isinstance(batch, StagedUpload):
        return batch.rollout_hashes()  # the same bytes, read from the staged columns
    out = []
    for rows in batch.rollout_slices():
        h = hashlib.sha256()
        for part in _content_arrays(batch):
            h.update(np.ascontiguousarray(part[rows]).tobytes())
        if batch.scene is not None:
            for value in batch.scene[rows]:
                h.update(
                    b"\x00"
                    if value is None
                    else hashlib.sha256(
                        value if isinstance(value, bytes) else str(value).encode()
                    ).digest()
                )
        if batch.image_sha256 is not None:
            for digest in batch.image_sha256[rows]:
                h.update(b"\x00" if digest is None else bytes.fromhex(digest))
        out.append(h.hexdigest())
    return out


def _content_arrays(batch: StepBatch) -> list[np.ndarray]:
    parts: list[np.ndarray] = [batch.step, batch.time_s, batch.control, batch.features]
    for value in (
        batch.learner_action,
        batch.expert_action,
        batch.learner_probs,
        batch.learner_ensemble,
        batch.learner_std,
    ):
        if isinstance(value, Vectors):
            parts += [value.values, value.present]
        elif value is not None:
            parts.append(value)
    return parts


def _store(
    session: Session,
    loop: Loop,
    rnd: Round,
    batch: StepBatch | StagedUpload,
    hashes: list[str],
    keep: np.ndarray,
    filename: str,
    file_format: str,
    file_sha256: str,
    user_id: int | None,
    blob_dir: Path,
) -> tuple[Upload, PackWrite | None]:
    """Store the kept rollouts with their steps, and their images last (image_store: the pack
    is then written as close to the commit as it can be)."""
    if isinstance(batch, StagedUpload):
        counts = batch.counts
    else:
        counts = np.array([s.stop - s.start for s in batch.rollout_slices()], dtype=np.int64)
    upload = Upload(
        round_id=rnd.id,
        file_sha256=file_sha256,
        filename=filename[:300],
        file_format=file_format,
        n_rollouts=int(keep.sum()),
        n_steps=int(counts[keep].sum()),
        uploaded_by=user_id,
    )
    session.add(upload)
    session.flush()
    kept = np.flatnonzero(keep)
    if len(kept) == 0:
        return upload, None
    rollout_rows = [
        {
            "loop_id": loop.id,
            "round_id": rnd.id,
            "upload_id": upload.id,
            "key": batch.rollout_keys[r],
            "robot": batch.robot[r],
            "n_steps": int(counts[r]),
            "content_sha256": hashes[r],
            "uploaded_by": user_id,
        }
        for r in kept
    ]
    created = session.execute(
        insert(Rollout).returning(Rollout.id, Rollout.key), rollout_rows
    ).all()
    id_of_key = {key: rid for rid, key in created}
    rollout_id_of = np.zeros(len(batch.rollout_keys), dtype=np.int64)
    for r in kept:
        rollout_id_of[r] = id_of_key[batch.rollout_keys[r]]
    if isinstance(batch, StagedUpload):
        return upload, _store_staged_steps(session, batch, keep, rollout_id_of, rnd.id, blob_dir)
    row_keep = keep[batch.rollout_index]
    pick = _pick(row_keep)
    columns = step_columns(batch, pick, rollout_id_of, rnd.id)
    bulk.insert_steps(session.connection(), columns, int(row_keep.sum()))
    image_sha256 = columns["image_sha256"]
    if batch.image is None or not isinstance(image_sha256, list):
        return upload, None
    pack = image_store.store_images(
        session, images=batch.image[pick], sha256=image_sha256, blob_dir=blob_dir
    )
    return upload, pack


def _store_staged_steps(
    session: Session,
    staged: StagedUpload,
    keep: np.ndarray,
    rollout_id_of: np.ndarray,
    round_id: int,
    blob_dir: Path,
) -> PackWrite | None:
    """Insert the kept rollouts' steps of a staged upload a chunk at a time, then its images
    into one pack, each image read from the staging folder only while the pack is written."""
    connection = session.connection()
    lengths: dict[str, int] = {}  # each new image's length, in the order of its first step
    where: dict[str, int] = {}  # and where it starts in the staged image data
    for start, stop in staged.chunks():
        chunk = staged.batch(start, stop)
        row_keep = keep[chunk.rollout_index]
        if not row_keep.any():
            continue
        pick = _pick(row_keep)
        columns = step_columns(chunk, pick, rollout_id_of, round_id)
        bulk.insert_steps(connection, columns, int(row_keep.sum()))
        digests = columns["image_sha256"]
        if isinstance(digests, list):
            spans = staged.image_spans(start, stop)[pick]
            for digest, (offset, length) in zip(digests, spans.tolist(), strict=True):
                if digest is not None and digest not in lengths:
                    lengths[digest], where[digest] = length, offset
    if not lengths:
        return None
    path, size = staged.image_file()
    return image_store.store_image_rows(
        session,
        lengths=lengths,
        read=lambda digest: staged.read_image(where[digest], lengths[digest]),
        blob_dir=blob_dir,
        staged=image_store.StagedImages(path, size, where),
    )


def _pick(rows: np.ndarray) -> np.ndarray | slice:
    """Index for the selected rows (`rows`: a boolean mask). Every row is new in the usual
    upload: a full slice takes views where the mask would copy each column (some 0.6 s at a
    million steps of 64 features)."""
    return slice(None) if rows.all() else rows


def step_columns(
    batch: StepBatch,
    pick: np.ndarray | slice,
    rollout_id_of: np.ndarray,
    round_id: int,
) -> dict[str, bulk.Column]:
    """The steps table's columns for the selected rows of a batch (`pick`, from `_pick`)."""
    n = len(batch.step[pick])

    def vectors(value: Vectors | None) -> list[bytes | None] | None:
        if value is None or not value.present[pick].any():
            return None
        blobs: list[bytes | None] = list(rows_to_bytes(value.values[pick]))
        for i in np.flatnonzero(~value.present[pick]):
            blobs[i] = None
        return blobs

    def discrete(value: np.ndarray | Vectors | None) -> list[int | None] | None:
        if value is None or isinstance(value, Vectors):
            return None
        index = value[pick]
        out: list[int | None] = index.tolist()
        for i in np.flatnonzero(index < 0):
            out[i] = None
        return out

    def continuous(value: np.ndarray | Vectors | None) -> list[bytes | None] | None:
        return vectors(value) if isinstance(value, Vectors) else None

    ensemble = vectors(batch.learner_ensemble)
    return {
        "rollout_id": rollout_id_of[batch.rollout_index[pick]],
        "round_id": [round_id] * n,
        "step_index": batch.step[pick],
        "time_s": batch.time_s[pick],
        "control": batch.control[pick].astype(np.int64),
        "features": rows_to_bytes(batch.features[pick]),
        "learner_action": discrete(batch.learner_action),
        "learner_action_vec": continuous(batch.learner_action),
        "expert_action": discrete(batch.expert_action),
        "expert_action_vec": continuous(batch.expert_action),
        "learner_probs": vectors(batch.learner_probs),
        "learner_ensemble": ensemble,
        "ensemble_size": None
        if ensemble is None
        else [batch.ensemble_size if b is not None else None for b in ensemble],
        "learner_std": vectors(batch.learner_std),
        "scene": None if batch.scene is None else list(batch.scene[pick]),
        "image_sha256": None
        if batch.image_sha256 is None
        else np.asarray(batch.image_sha256, dtype=object)[pick].tolist(),
    }


def _outcome_of(session: Session, upload: Upload, *, duplicate_file: bool) -> UploadOutcome:
    rows = session.execute(
        select(Rollout.key, Rollout.n_steps)
        .where(Rollout.upload_id == upload.id)
        .order_by(Rollout.key)
    ).all()
    return UploadOutcome(
        upload_id=upload.id,
        duplicate_file=duplicate_file,
        n_steps=int(sum(n for _, n in rows)),
        rollouts=[{"key": k, "steps": n} for k, n in rows],
    )
