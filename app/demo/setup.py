"""`expertloop serve --demo`: the invented tow-tractor loop, ready to label at once.

Creates (once) a demo admin and a demo annotator, the discrete demo loop with round 0
demonstrations and round 1 rollouts from demo_data/, and ranks round 1 so its queue is filled.
Everything here is invented for the demo and says so.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

from sqlalchemy import select

from ..auth import service as auth_service
from ..auth.models import User
from ..config import get_settings
from ..db import make_engine, make_session_factory
from ..errors import NotFound
from ..ingest import service as ingest_service
from ..job_handlers import register_job_handlers
from ..jobs import runner
from ..loops import service as loops_service
from ..loops.schemas import LoopCreate
from ..resources import shipped_folder
from ..sampler import service as sampler_service

DEMO_DIR = shipped_folder("demo_data")
DEMO_SPEC = DEMO_DIR / "tow_tractor_discrete.json"
ROUND0_FILE = DEMO_DIR / "round0_demonstrations.parquet"
ROUND1_FILE = DEMO_DIR / "round1_rollouts.parquet"
BAG_FILE = DEMO_DIR / "tow_tractor_run.mcap"
DEMO_BUDGET = 60
DEMO_SEED = 2026
# Demo accounts for a server on loopback; never use them on a shared machine.
DEMO_USERS = {
    "demo-admin": (["admin"], "demo-admin-pw"),
    "demo-annotator": (["annotator"], "demo-annotator-pw"),
}


def _file_sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def prepare_demo(*, host: str, port: int) -> str:
    """Load the demo loop and users if missing; return what to open and how to sign in."""
    settings = get_settings()
    factory = make_session_factory(make_engine(settings.resolved_database_url))
    spec = LoopCreate.model_validate(json.loads(DEMO_SPEC.read_text()))
    with factory() as session:
        for name, (roles, password) in DEMO_USERS.items():
            user = session.scalar(select(User).where(User.name == name))
            if user is None:
                auth_service.create_user(session, name=name, roles=roles, password=password)
            else:
                auth_service.set_password(session, user=user, password=password)
        session.commit()
        try:
            loop = loops_service.get_loop(session, slug=spec.slug)
        except NotFound:
            loop = loops_service.create_loop(session, spec=spec, user_id=None)
            session.commit()
        if loop.log_mapping is None and spec.log_mapping is not None:
            # a demo store made before the demo had its robot log
            loop.log_mapping = spec.log_mapping.model_dump()
            session.commit()
        rounds = {r.number: r for r in loops_service.round_summaries(session, loop=loop)}
        if rounds[0].steps == 0:
            _upload(session, loop, 0, ROUND0_FILE)
        if 1 not in rounds:
            loops_service.open_round(
                session, loop=loop, learner_version="demo-learner-1", user_id=None
            )
            session.commit()
            _upload(session, loop, 1, ROUND1_FILE)
            rnd = loops_service.get_round(session, loop=loop, number=1)
            sampler_service.request_ranking(
                session, loop=loop, rnd=rnd, budget=DEMO_BUDGET, seed=DEMO_SEED, user_id=None
            )
            session.commit()
    # rank now, so the bench has work the moment the server is up
    register_job_handlers()
    while runner.run_one(factory, settings, "demo-setup"):
        pass
    base = f"http://{host}:{port}"
    return (
        "expertloop demo (invented data: a tow tractor at warehouse aisle crossings)\n"
        f"  label:     {base}/loops/{spec.slug}/bench   sign in as demo-annotator / "
        f"{DEMO_USERS['demo-annotator'][1]}\n"
        f"  loop page: {base}/loops/{spec.slug}         sign in as demo-admin / "
        f"{DEMO_USERS['demo-admin'][1]}\n"
        "  (demo accounts for a loopback server only)\n"
        f"  robot log: {BAG_FILE.relative_to(DEMO_DIR.parent)} (an invented ROS 2 bag); with a "
        "token from `expertloop tokens issue demo-admin`:\n"
        f"    expertloop logs inspect {BAG_FILE.relative_to(DEMO_DIR.parent)} --loop {spec.slug} "
        f"--url {base} --token TOKEN\n"
        f"    expertloop upload {BAG_FILE.relative_to(DEMO_DIR.parent)} --loop {spec.slug} "
        f"--round 1 --url {base} --token TOKEN"
    )


def _upload(session, loop, number: int, path: Path) -> None:  # type: ignore[no-untyped-def]
    rnd = loops_service.get_round(session, loop=loop, number=number)
    ingest_service.ingest_file(
        session,
        loop=loop,
        rnd=rnd,
        path=path,
        filename=path.name,
        file_sha256=_file_sha256(path),
        user_id=None,
        blob_dir=get_settings().blob_dir,
    )
