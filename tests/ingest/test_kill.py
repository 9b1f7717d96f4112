"""A loader killed mid-load (SIGKILL) leaves the registry unchanged; a re-run completes."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time

from cohort.ingest.loader import load_file
from cohort.registry import connect
from tests.conftest import ECG_HEADER, ecg_row, write_csv

_CHILD = textwrap.dedent(
    """
    import sys, time
    from pathlib import Path
    from cohort.ingest import loader
    from cohort.registry import connect

    marker = Path(sys.argv[3])
    real = loader._write_outcomes

    def write_and_wait(con, *args):
        counts = real(con, *args)       # rows are written inside the open transaction...
        marker.write_text("written")    # ...tell the parent, then wait to be killed
        time.sleep(60)
        return counts

    loader._write_outcomes = write_and_wait
    con = connect(sys.argv[1])
    loader.load_file(con, sys.argv[2])
    """
)


def test_sigkill_mid_load_leaves_registry_unchanged(tmp_path, persons_file):
    db = tmp_path / "registry.duckdb"
    con = connect(db)
    load_file(con, persons_file)
    before = con.execute("SELECT (SELECT count(*) FROM ecg), (SELECT count(*) FROM load_log)").fetchone()
    con.close()
    ecgs = write_csv(tmp_path / "ecgs.csv", ECG_HEADER, [ecg_row(f"T{i}", "P1") for i in range(2000)])
    marker = tmp_path / "marker"
    child = subprocess.Popen([sys.executable, "-c", _CHILD, str(db), str(ecgs), str(marker)], env=os.environ.copy())
    deadline = time.monotonic() + 60
    while not marker.exists() and child.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    assert marker.exists(), "child never reached the write step"
    child.send_signal(signal.SIGKILL)
    child.wait(timeout=30)
    con = connect(db)
    assert con.execute("SELECT (SELECT count(*) FROM ecg), (SELECT count(*) FROM load_log)").fetchone() == before
    result = load_file(con, ecgs)
    assert result.rows_loaded == 2000 and result.reconciles
    con.close()
