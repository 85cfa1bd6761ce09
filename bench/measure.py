"""Run one measured step as a child process: wall time and peak memory.

Two memory figures are recorded for every step:

``peak_rss_mib``
    The largest resident set of any single process of the step (the kernel's ``ru_maxrss``,
    read by ``/usr/bin/time -v`` when present, else by a tiny wrapper process whose
    ``RUSAGE_CHILDREN`` covers only the one step it runs, so no earlier step leaks into it).
``tree_rss_mib``
    The largest *sum* of proportional set sizes (PSS: a page shared by n processes counts 1/n
    in each) over the step's whole process tree, sampled from ``/proc/PID/smaps_rollup`` every
    100 ms (a read costs about 0.7 ms of kernel time for a 2 GiB process): the memory the whole
    step holds, pool workers and a Spark JVM included, with the pages a forked worker still
    shares with its parent counted once. Sampling can miss a short spike. (Plain resident sets
    where the kernel has no ``smaps_rollup``, which overstates.)

Wall time is measured around the child with :func:`time.perf_counter`; CPU time (user + system,
the step's processes and the children they waited for) comes from ``/usr/bin/time -v``. On a
shared machine CPU time is the steadier figure: wall time grows with other users' load.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass
from pathlib import Path

_TIME_BIN = "/usr/bin/time"
_PAGE_KIB = os.sysconf("SC_PAGE_SIZE") // 1024 if hasattr(os, "sysconf") else 4

#: Runs argv[1:] as a child and prints its ru_maxrss [KiB] on stderr's last line.
_WRAPPER = (
    "import resource,subprocess,sys;"
    "rc=subprocess.call(sys.argv[1:]);"
    "print('TT_MAXRSS_KIB=%d' % resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss,"
    " file=sys.stderr);"
    "sys.exit(rc)"
)


@dataclass(frozen=True)
class Measurement:
    """One run of one step."""

    wall_s: float  #: elapsed wall-clock time [s]
    peak_rss_mib: float  #: largest single-process resident set [MiB]
    tree_rss_mib: float  #: largest sampled sum of resident sets over the process tree [MiB]
    returncode: int
    stderr_tail: str
    cpu_s: float = float("nan")  #: user + system CPU time of the step's processes [s]


def _children_map() -> dict[int, list[int]]:
    kids: dict[int, list[int]] = {}
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/stat", "rb") as fh:
                stat = fh.read()
        except OSError:
            continue
        # the command name may contain spaces and parentheses: split after the last ')'
        rest = stat[stat.rfind(b")") + 2 :].split()
        if len(rest) > 1:
            kids.setdefault(int(rest[1]), []).append(int(entry))
    return kids


def _rss_kib(pid: int) -> int:
    """The process's proportional set size [KiB] (its resident set, with each page shared
    among n processes counted 1/n), from ``/proc/PID/smaps_rollup``; the plain resident set
    from ``statm`` where that file is missing (kernels before 4.14)."""
    try:
        with open(f"/proc/{pid}/smaps_rollup", "rb") as fh:
            for line in fh:
                if line.startswith(b"Pss:"):
                    return int(line.split()[1])
    except (OSError, IndexError, ValueError):
        pass
    try:
        with open(f"/proc/{pid}/statm", "rb") as fh:
            return int(fh.read().split()[1]) * _PAGE_KIB
    except (OSError, IndexError, ValueError):
        return 0


def _tree_rss_kib(root: int) -> int:
    kids = _children_map()
    total, stack = 0, [root]
    while stack:
        pid = stack.pop()
        total += _rss_kib(pid)
        stack.extend(kids.get(pid, ()))
    return total


class _TreeSampler(threading.Thread):
    def __init__(self, pid: int, interval_s: float = 0.1) -> None:
        super().__init__(daemon=True)
        self.pid, self.interval_s, self.peak_kib = pid, interval_s, 0
        self._stop_event = threading.Event()

    def run(self) -> None:  # pragma: no cover - timing dependent
        while not self._stop_event.is_set():
            self.peak_kib = max(self.peak_kib, _tree_rss_kib(self.pid))
            self._stop_event.wait(self.interval_s)

    def stop(self) -> None:
        self._stop_event.set()
        self.join(timeout=2)


def run_measured(
    argv: list[str],
    *,
    cwd: Path | None = None,
    env: dict[str, str] | None = None,
    stdout_path: Path | None = None,
    timeout_s: float | None = None,
) -> Measurement:
    """Run ``argv`` once as a child process and measure it.

    Parameters
    ----------
    argv
        Command and arguments (no shell).
    cwd, env
        Working folder and environment of the child.
    stdout_path
        Where the child's stdout goes (default: discarded).
    timeout_s
        Kill the child after this long [s]; the measurement then has returncode -9.
    """
    sampled = os.path.isdir("/proc")
    with tempfile.TemporaryDirectory(prefix="tt_bench_") as tmp:
        time_out = Path(tmp) / "time.txt"
        if shutil.which(_TIME_BIN) or os.path.exists(_TIME_BIN):
            full = [_TIME_BIN, "-v", "-o", str(time_out), *argv]
        else:
            full = [sys.executable, "-c", _WRAPPER, *argv]
        out = open(stdout_path, "wb") if stdout_path else subprocess.DEVNULL  # noqa: SIM115
        err_path = Path(tmp) / "stderr.txt"
        try:
            with open(err_path, "wb") as err:
                t0 = time.perf_counter()
                proc = subprocess.Popen(full, cwd=cwd, env=env, stdout=out, stderr=err)
                sampler = _TreeSampler(proc.pid) if sampled else None
                if sampler:
                    sampler.start()
                try:
                    rc = proc.wait(timeout=timeout_s)
                except subprocess.TimeoutExpired:
                    proc.kill()
                    proc.wait()
                    rc = -9
                wall = time.perf_counter() - t0
                if sampler:
                    sampler.stop()
        finally:
            if stdout_path:
                out.close()  # type: ignore[union-attr]
        text = err_path.read_text(errors="replace")
        maxrss_kib = 0
        cpu = float("nan")
        if time_out.exists():
            user = system = None
            for line in time_out.read_text(errors="replace").splitlines():
                if "Maximum resident set size" in line:
                    maxrss_kib = int(line.rsplit(":", 1)[1].strip())
                elif "User time (seconds)" in line:
                    user = float(line.rsplit(":", 1)[1])
                elif "System time (seconds)" in line:
                    system = float(line.rsplit(":", 1)[1])
            if user is not None and system is not None:
                cpu = user + system
        for line in text.splitlines():
            if line.startswith("TT_MAXRSS_KIB="):
                maxrss_kib = int(line.split("=", 1)[1])
        text = "\n".join(ln for ln in text.splitlines() if not ln.startswith("TT_MAXRSS_KIB="))
    tree_kib = sampler.peak_kib if sampled and sampler else 0
    return Measurement(
        wall_s=wall,
        peak_rss_mib=maxrss_kib / 1024.0,
        tree_rss_mib=max(tree_kib, maxrss_kib) / 1024.0,
        returncode=rc,
        stderr_tail=text[-2000:],
        cpu_s=cpu,
    )
