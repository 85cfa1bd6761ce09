"""Smoke test of the benchmark harness (no timing thresholds: the machine is shared and noisy)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from bench.measure import Measurement, run_measured
from bench.run import Result, Step, Target, default_results_path, table_rows

REPO = Path(__file__).resolve().parents[2]


def test_peak_memory_of_a_child_is_measured() -> None:
    # a child that holds 200 MiB of bytes: its peak resident set must show it, and a lighter
    # child measured afterwards must not inherit that peak (no cumulative RUSAGE_CHILDREN)
    big = run_measured([sys.executable, "-c", "b = bytearray(200 * 2**20); b[::4096] = b'x' * len(b[::4096])"])
    small = run_measured([sys.executable, "-c", "pass"])
    assert big.returncode == 0 and small.returncode == 0
    assert big.peak_rss_mib >= 190
    assert small.peak_rss_mib < 100
    assert big.tree_rss_mib >= big.peak_rss_mib * 0.99
    assert big.wall_s > 0 and big.cpu_s >= 0


def test_failing_child_keeps_its_exit_code_and_stderr() -> None:
    m = run_measured([sys.executable, "-c", "import sys; print('boom here', file=sys.stderr); sys.exit(3)"])
    assert m.returncode == 3
    assert "boom here" in m.stderr_tail


def _res(name: str, wall: float, peak: float = 10.0, floor: str | None = None, target: Target | None = None) -> Result:
    step = Step(name, name, lambda: [], floor=floor, target=target or Target())
    return Result(step, [Measurement(wall, peak, peak, 0, ""), Measurement(wall * 3, peak, peak, 0, ""), Measurement(wall, peak, peak, 0, "")])


def test_ratios_and_verdicts() -> None:
    floor = _res("raw_load", 2.0)
    ok = _res("ingest", 2.4, 500, "raw_load", Target("ratio", 1.3, 1024, ""))
    slow = _res("tubes", 12.0, 500, "raw_load", Target("ratio", 5.0, 2048, ""))
    fat = _res("ingest2", 2.0, 1500, "raw_load", Target("ratio", 1.3, 1024, ""))
    rows = {r[0]: r for r in table_rows([floor, ok, slow, fat])}
    assert rows["raw_load"][2] == "2.00"  # median of 2, 6, 2
    assert rows["ingest"][10] == "1.200" and rows["ingest"][12] == "met"
    assert rows["tubes"][10] == "6.000" and rows["tubes"][12] == "NOT met"
    assert rows["ingest2"][12] == "NOT met"  # ratio met, peak memory over 1 GiB


def test_only_the_full_size_writes_the_recorded_results() -> None:
    # a smoke run (--small, or any other size) must not replace the recorded full-size figures
    assert default_results_path(5000, 10_000_000) == REPO / "bench" / "RESULTS.md"
    small = default_results_path(300, 500_000)
    assert small.parent == REPO / "bench" / "out" and small.name == "RESULTS-t300_e500000.md"
    assert default_results_path(5000, 2_000_000) != default_results_path(1000, 2_000_000)
    if (REPO / ".git").exists():
        ignored = subprocess.run(["git", "check-ignore", "-q", str(small)], cwd=REPO)
        assert ignored.returncode == 0, "bench/out/ must stay out of git"


@pytest.mark.slow
def test_bench_runs_end_to_end_on_a_tiny_fleet(tmp_path: Path) -> None:
    results = tmp_path / "RESULTS.md"
    proc = subprocess.run(
        [sys.executable, "-m", "bench", "--tubes", "16", "--exposures", "20000", "--repeat", "1",
         "--stand-in", "--steps", "help,raw_load,ingest,incremental,export_lake",
         "--data", str(tmp_path / "data"), "--results", str(results)],
        cwd=REPO, capture_output=True, text=True, timeout=900,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    text = results.read_text()
    assert "<!-- bench:begin -->" in text and "cores usable" in text
    for step in ("help", "raw_load", "ingest", "incremental", "export_lake"):
        assert f"| {step} |" in text
    line = next(ln for ln in text.splitlines() if ln.startswith("| raw_load |"))
    assert float(line.split("|")[3]) > 0  # a measured median, not a placeholder
