"""A change of users, API tokens or browser sessions waits, after its commit, as long as app
processes may still reuse an access version read begun before it (FRESH_S), so that whoever made
the change goes on only once no process can answer from an identity it cached before.

Every request would otherwise read the access version (app/auth/access_version.py): a round
trip on PostgreSQL, and on SQLite a read whose file locks cost more than the rest of the
identification; with this wait a process may answer a request from a read begun at most FRESH_S
before the request arrived. Why that keeps a revocation, a deactivation, a role change or a
sign-out immediate: the change commits at t and its maker returns at t + FRESH_S or later; a
request sent after that arrives later still, and takes only an answer read from t on. SQL typed
by hand (no session, or a textual UPDATE) does not wait: it counts within FRESH_S.

The hooks are Session events, registered once for every session of the process when this module
is imported (app/auth/service.py imports it: every process that changes these tables does).
"""

from __future__ import annotations

import time
from typing import Any

from sqlalchemy import event
from sqlalchemy.orm import ORMExecuteState, Session, UOWTransaction

from .models import WATCHED_TABLES, ApiToken, BrowserSession, User

FRESH_S = 0.05
_WATCHED = (User, ApiToken, BrowserSession)
_CHANGED = "expertloop_access_changed"  # in Session.info, until the commit has waited


def _watched(instance: Any) -> bool:
    return isinstance(instance, _WATCHED)


@event.listens_for(Session, "after_flush")
def _note_flushed_change(session: Session, _flush: UOWTransaction) -> None:
    # the session's lists still hold what this flush wrote
    if any(_watched(o) for o in session.deleted) or any(
        _watched(o) and session.is_modified(o) for o in session.dirty
    ):
        session.info[_CHANGED] = True


@event.listens_for(Session, "do_orm_execute")
def _note_bulk_change(state: ORMExecuteState) -> None:
    if state.is_update or state.is_delete:
        table = getattr(state.statement, "table", None)
        if getattr(table, "name", None) in WATCHED_TABLES:
            state.session.info[_CHANGED] = True


@event.listens_for(Session, "after_commit")
def _wait_out_reused_reads(session: Session) -> None:
    # A rolled-back change leaves the mark for the session's next commit: one wait too many,
    # never one too few.
    if session.info.pop(_CHANGED, False):
        time.sleep(FRESH_S)
