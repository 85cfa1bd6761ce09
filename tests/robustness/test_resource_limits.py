"""A large generated exposures CSV ingests with bounded peak memory (issue 7, item 6).

The ingest runs as a grandchild under a small wrapper process, so the wrapper's
RUSAGE_CHILDREN peak resident set size is the ingest's alone (not that of earlier test
children). Measured figures are recorded in docs/robustness.md.
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from tubetrack import store

from .conftest import child_env, tubetrack_cmd
from .test_concurrent_use import write_bulk_exposures

pytestmark = pytest.mark.slow

N_ROWS = 2_500_000
#: Generous bound on the ingest's peak RSS [bytes]: the ingest CLI caps DuckDB at 1 GB
#: (TUBETRACK_INGEST_MEMORY) and spills beyond it; the Python process adds ~0.2 GB.
PEAK_RSS_BOUND_B = int(1.5 * 2**30)

MEASURE = (
    "import json, resource, subprocess, sys, time\n"
    "t0 = time.monotonic()\n"
    "rc = subprocess.run(sys.argv[1:], stdout=subprocess.DEVNULL).returncode\n"
    "wall = time.monotonic() - t0\n"
    "ru = resource.getrusage(resource.RUSAGE_CHILDREN)\n"
    "print(json.dumps({'rc': rc, 'maxrss_kib': ru.ru_maxrss, 'wall_s': wall,\n"
    "                  'cpu_s': ru.ru_utime + ru.ru_stime}))\n"
)


@pytest.fixture(scope="module")
def large_logs(tmp_path_factory):
    logs = tmp_path_factory.mktemp("large") / "logs"
    logs.mkdir()
    write_bulk_exposures(logs / "exposures-large.csv", N_ROWS)
    return logs


@pytest.mark.parametrize(
    ("memory_limit", "bound_b"),
    [
        (None, PEAK_RSS_BOUND_B),
        # a smaller DuckDB cap lowers the peak with it: the file streams and spills
        ("256MB", 768 * 2**20),
    ],
)
def test_large_csv_ingests_with_bounded_peak_memory(large_logs, tmp_path, memory_limit, bound_b):
    logs = large_logs
    size_b = (logs / "exposures-large.csv").stat().st_size
    db = tmp_path / "store.duckdb"
    env = child_env(**({"TUBETRACK_INGEST_MEMORY": memory_limit} if memory_limit else {}))
    proc = subprocess.run(
        [sys.executable, "-c", MEASURE,
         *tubetrack_cmd("ingest", "--db", str(db), "--quiet", "-f", "json", str(logs))],
        capture_output=True,
        text=True,
        env=env,
        timeout=600,
    )
    assert proc.returncode == 0, proc.stderr
    figures = json.loads(proc.stdout.strip().splitlines()[-1])
    assert figures["rc"] == 0, proc.stderr
    peak_b = figures["maxrss_kib"] * 1024  # Linux reports ru_maxrss in KiB
    print(
        f"\ningest (memory limit {memory_limit or 'default'}) of {N_ROWS:,} rows ({size_b / 2**20:.0f} MiB CSV): peak RSS "
        f"{peak_b / 2**20:.0f} MiB, wall {figures['wall_s']:.1f} s, CPU {figures['cpu_s']:.1f} s"
    )
    assert peak_b < bound_b
    # nothing lost on the way
    con = store.connect(db, read_only=True)
    try:
        row = con.execute(
            "SELECT rows_read, rows_accepted, rows_rejected, rows_duplicate FROM ingest_files"
        ).fetchall()
        assert row == [(N_ROWS, N_ROWS, 0, 0)]
        assert con.execute("SELECT count(*) FROM exposures").fetchall()[0][0] == N_ROWS
    finally:
        con.close()
