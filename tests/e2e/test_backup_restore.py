"""docs/operations.md's backup and restore, followed step by step against a
real stopcockd, and what a LIMS poller sees after it (docs/lims.md, "After a
restore"). Before: after a restore the feed gave runs again under seqs the
poller held, the next POST got a run id the LIMS already held, and a poller
whose cursor was past the backup missed everything new."""
import pathlib
import shutil
import subprocess

import pytest

import daemon_bench as db


@pytest.fixture
def bench(tmp_path):
    b = db.Bench(tmp_path)
    b.put_method()
    yield b
    b.close()


def database(bench):
    for line in bench.config.read_text().splitlines():
        if line.strip().startswith("database:"):
            p = pathlib.Path(line.split(":", 1)[1].strip())
            return p if p.is_absolute() else bench.tmp / p
    raise AssertionError("no database: in the config")


def aborted_run(bench, sample):
    rid = bench.start_run(sample=sample)
    bench.write("POST", f"/v1/runs/{rid}/abort")
    bench.wait_state(rid, ("aborted",), timeout_s=30)
    return rid


def test_backup_and_restore_as_documented(bench):
    dbfile = database(bench)
    for i in range(3):
        aborted_run(bench, f"BEFORE-{i}")
    bench.fresh_beaker()
    running = bench.start_run(sample="AT-BACKUP")
    bench.wait_points(running, 1)
    # docs/operations.md, "Backups": SQLite's online backup while the daemon writes.
    backup = bench.tmp / "backup.db"
    subprocess.run(["sqlite3", str(dbfile), f".backup {backup}"], check=True)
    ic = subprocess.run(["sqlite3", str(backup), "PRAGMA integrity_check"], capture_output=True,
                        text=True, check=True)
    assert ic.stdout.strip() == "ok"
    bench.write("POST", f"/v1/runs/{running}/abort")
    bench.wait_state(running, ("aborted",), timeout_s=30)
    later = [aborted_run(bench, f"AFTER-{i}") for i in range(2)]
    feed = bench.get("/v1/results?after=0&limit=1000")
    held_ids = {r["id"] for r in feed["results"]}
    cursor, history = feed["next_after"], feed["history"]
    assert len(history) == 32
    # "To restore: stop the daemon, put the backup in place as stopcock.db,
    # remove any old stopcock.db-wal and stopcock.db-shm, start the daemon."
    assert bench.stop_daemon() == 0
    shutil.copyfile(backup, dbfile)
    for ext in ("-wal", "-shm"):
        p = dbfile.with_name(dbfile.name + ext)
        if p.exists():
            p.unlink()
    bench.start_daemon()

    # The poller sees another history and keeps its cursor; nothing it holds
    # comes again under a seq it has passed, nothing new hides below it.
    page = bench.get(f"/v1/results?after={cursor}")
    assert page["history"] != history
    assert all(r["seq"] > cursor for r in page["results"])
    again = {r["id"]: r for r in page["results"]}
    # The run that was running at the backup comes once more, marked as such.
    assert set(again) <= {running}, again
    if running in again:
        assert again[running]["state"] == "interrupted"
        assert [f["code"] for f in again[running]["faults"]][-1] == "interrupted"
        assert "restored from a backup" in again[running]["stop_detail"]
    # A new run never gets an id the LIMS already holds, nor a seq it passed.
    bench.resume()
    new = aborted_run(bench, "AFTER-RESTORE")
    assert new not in held_ids and new > max(held_ids), (new, sorted(held_ids))
    rec = bench.run(new)
    assert rec["seq"] > cursor
    page = bench.get(f"/v1/results?after={cursor}")
    assert new in {r["id"] for r in page["results"]}
    assert set(later) <= held_ids
