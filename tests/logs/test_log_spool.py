"""The spool entries a bag is read through (a link beside the upload, or the folder an archive is
unpacked into) are swept at server start when a crashed process left them, like uploads."""

from __future__ import annotations

import os
import time

from fastapi.testclient import TestClient

from expertloop.ingest.logs.archive import SPOOL_PREFIX
from tests.logs.bags import build
from tests.logs.test_log_upload import make_loop, upload

DAY_AGO = time.time() - 2 * 24 * 3600


def _age(*paths):
    for path in paths:
        os.utime(path, (DAY_AGO, DAY_AGO), follow_symlinks=False)


def test_a_starting_server_sweeps_day_old_bag_links_and_folders(app, settings):
    spool = settings.upload_dir
    spool.mkdir(parents=True)
    upload_file = spool / "upload-in-flight"
    upload_file.write_bytes(b"#ROSBAG")
    live_link = spool / f"{SPOOL_PREFIX}upload-in-flight.bag"
    live_link.symlink_to(upload_file)
    stale_link = spool / f"{SPOOL_PREFIX}upload-gone.mcap"
    stale_link.symlink_to(spool / "upload-gone")  # its upload was swept already: dangling
    stale_folder = spool / f"{SPOOL_PREFIX}upload-old.d"
    (stale_folder / "run" / "run_0.mcap").parent.mkdir(parents=True)
    (stale_folder / "run" / "run_0.mcap").write_bytes(b"x")
    busy_folder = spool / f"{SPOOL_PREFIX}upload-busy.d"
    (busy_folder / "run").mkdir(parents=True)
    (busy_folder / "run" / "run_0.mcap").write_bytes(b"still being unpacked")
    other = spool / "notes.txt"  # not ours to sweep, however old
    other.write_bytes(b"x")
    _age(stale_link, live_link, other)
    _age(*(stale_folder / p for p in ("run/run_0.mcap", "run", "")))
    _age(busy_folder / "run", busy_folder)  # the folder is old, a file inside is being written

    with TestClient(app):
        pass

    assert not os.path.lexists(stale_link)
    assert not stale_folder.exists()
    # a link counts by its own time, so the day-old link to a live upload goes too; the upload
    # itself is fresh and stays
    assert not os.path.lexists(live_link) and upload_file.exists()
    assert busy_folder.exists() and (busy_folder / "run" / "run_0.mcap").exists()
    assert other.exists()


def test_fresh_bag_entries_stay_and_uploads_leave_none(client, admin, uploader, settings, tmp_path):
    from expertloop.ingest.spool import sweep_stale

    make_loop(client, admin)
    path, _ = build(tmp_path, "sqlite3")  # a .tar of a bag folder: unpacked in the spool
    assert upload(client, uploader, path).status_code == 201
    assert not list(settings.upload_dir.glob(f"{SPOOL_PREFIX}*"))

    fresh = settings.upload_dir / f"{SPOOL_PREFIX}upload-x.d"
    fresh.mkdir()
    assert sweep_stale(settings.upload_dir, pattern=f"{SPOOL_PREFIX}*") == 0
    assert fresh.exists()
    _age(fresh)
    assert sweep_stale(settings.upload_dir, pattern=f"{SPOOL_PREFIX}*") == 1
    assert not fresh.exists()
