"""The benchmark: every step is a child process, measured next to its floor.

Floors are measured in the same run, on the same files: DuckDB's own
``CREATE TABLE AS SELECT * FROM read_csv(...)`` of the exposure files is the floor of ingest and
of the full health analysis (issue 9). A step whose command does not exist yet is reported as
"not available"; a step that fails is reported with its exit code and the end of its stderr.
"""

from __future__ import annotations

import datetime as dt
import os
import platform
import shutil
import statistics
import subprocess
import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from bench.data import REPO_ROOT, Dataset, build_dataset
from bench.measure import Measurement, run_measured

PY = sys.executable
BEGIN, END = "<!-- bench:begin -->", "<!-- bench:end -->"


@dataclass(frozen=True)
class Target:
    """A target from issue 9: ``kind`` is "ratio" (x floor), "abs_s" (seconds) or "none"."""

    kind: str = "none"
    limit: float = 0.0
    peak_mib: float | None = None
    text: str = "recorded"


@dataclass
class Step:
    name: str
    label: str
    argv: Callable[[], list[str]]
    floor: str | None = None
    target: Target = field(default_factory=Target)
    prepare: Callable[[], None] | None = None
    after: Callable[[], None] | None = None
    available: Callable[[], str | None] = lambda: None  # returns a reason when not available
    repeat: int | None = None
    heavy: bool = False  #: a whole-fleet analysis: run --repeat-heavy times (default once)
    items: int | None = None  # for a rate column (rows or files per second)
    stdout: Path | None = None
    #: left out of a default run above the --small size (name it in --steps to run it)
    optional: bool = False


@dataclass
class Result:
    step: Step
    runs: list[Measurement] = field(default_factory=list)
    status: str = "ok"  # ok | not available | failed | timeout | skipped
    reason: str = ""

    @property
    def wall_s(self) -> float | None:
        ok = [m.wall_s for m in self.runs if m.returncode == 0]
        return statistics.median(ok) if ok else None

    @property
    def cpu_s(self) -> float | None:
        ok = [m.cpu_s for m in self.runs if m.returncode == 0 and m.cpu_s == m.cpu_s]
        return statistics.median(ok) if ok else None

    @property
    def peak_mib(self) -> float | None:
        ok = [m.peak_rss_mib for m in self.runs if m.returncode == 0]
        return max(ok) if ok else None

    @property
    def tree_mib(self) -> float | None:
        ok = [m.tree_rss_mib for m in self.runs if m.returncode == 0]
        return max(ok) if ok else None


# ----------------------------------------------------------------------------- availability


_HELP_CACHE: dict[tuple[str, ...], tuple[int, str]] = {}


def _cli_help(*words: str) -> tuple[int, str]:
    if words not in _HELP_CACHE:
        proc = subprocess.run(
            [PY, "-m", "tubetrack", *words, "--help"],
            capture_output=True,
            text=True,
            cwd=REPO_ROOT,
            env=_env(),
            timeout=120,
        )
        _HELP_CACHE[words] = (proc.returncode, proc.stdout + proc.stderr)
    return _HELP_CACHE[words]


def cli_missing(*words: str) -> str | None:
    """``None`` when ``tubetrack <words>`` exists, else the reason."""
    rc, _ = _cli_help(*words)
    return None if rc == 0 else f"`tubetrack {' '.join(words)}` does not exist yet"


def cli_has_option(option: str, *words: str) -> bool:
    rc, text = _cli_help(*words)
    return rc == 0 and option in text


def module_missing(name: str, attr: str | None = None) -> str | None:
    proc = subprocess.run(
        [PY, "-c", f"import {name} as m; assert {attr is None} or hasattr(m, {attr!r})"],
        capture_output=True,
        cwd=REPO_ROOT,
        env=_env(),
        timeout=120,
    )
    if proc.returncode == 0:
        return None
    return f"`{name}{'.' + attr if attr else ''}` does not exist yet"


def _env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO_ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    env.pop("TUBETRACK_DB", None)
    env.setdefault("PYTHONHASHSEED", "0")
    return env


# ----------------------------------------------------------------------------- the steps


def _rm(path: Path) -> None:
    for p in (path, Path(str(path) + ".wal")):
        if p.is_dir():
            shutil.rmtree(p)
        elif p.exists():
            p.unlink()


def _raw_load_script(db: Path, glob: str, options: str = "") -> list[str]:
    code = (
        "import duckdb,sys;"
        "con=duckdb.connect(sys.argv[1]);"
        f"con.execute(\"CREATE OR REPLACE TABLE raw AS SELECT * FROM read_csv('\"+sys.argv[2].replace(\"'\",\"''\")+\"'{options})\");"
        "print(con.execute('SELECT count(*) FROM raw').fetchone()[0]);"
        "con.close()"
    )
    return [PY, "-c", code, str(db), glob]


def build_steps(ds: Dataset, work: Path, *, quiet_flag: list[str]) -> list[Step]:
    tt = [PY, "-m", "tubetrack"]
    raw_db, ingest_db, full_db = work / "raw.duckdb", work / "ingest.duckdb", work / "full.duckdb"
    inc_db, foreign_db, foreign_raw_db = work / "incr.duckdb", work / "foreign.duckdb", work / "foreign_raw.duckdb"
    dicom_db, lake = work / "dicom.duckdb", work / "lake"
    report_dir = work / "report"
    dicom_dir = ds.root / "dicom"

    def save_full() -> None:
        if ingest_db.exists():
            _rm(full_db)
            shutil.copy(ingest_db, full_db)

    def prep_incr() -> None:
        _rm(inc_db)
        if full_db.exists():
            shutil.copy(full_db, inc_db)

    def need_full() -> str | None:
        return cli_missing("ingest")

    def prep_dicom() -> None:
        _rm(dicom_db)
        if not (dicom_dir / ".done").exists():
            _make_dicom(ds, dicom_dir, n=10_000)

    engine_code = (
        "import sys,time;from tubetrack.engines import run_health;"
        "r=run_health(sys.argv[1], lake=sys.argv[2]);"
        "print(type(r).__name__)"
    )

    steps = [
        Step("help", "CLI start-up `tubetrack --help`", lambda: [*tt, "--help"], target=Target("abs_s", 0.5, text="< 0.5 s"), repeat=5),
        Step(
            "raw_load",
            "floor: DuckDB CTAS read_csv(exposures)",
            lambda: _raw_load_script(raw_db, ds.exposure_glob),
            prepare=lambda: _rm(raw_db),
            items=ds.n_exposures,
        ),
        Step(
            "ingest",
            "`tubetrack ingest` open layout (full)",
            lambda: [*tt, "ingest", str(ds.open_dir), "--db", str(ingest_db), *quiet_flag],
            floor="raw_load",
            target=Target("ratio", 1.3, 1024, "<= 1.3x floor, peak <= 1 GiB"),
            prepare=lambda: _rm(ingest_db),
            after=save_full,
            available=need_full,
            items=ds.n_exposures,
        ),
        Step(
            "incremental",
            "`tubetrack ingest` one more day into full store",
            lambda: [*tt, "ingest", str(ds.increment_dir), "--db", str(inc_db), *quiet_flag],
            floor="ingest",
            target=Target("ratio", 0.05, None, "<= 5 % of full ingest"),
            prepare=prep_incr,
            available=need_full,
            items=ds.n_exposures_increment,
        ),
        Step(
            "raw_load_foreign",
            "floor: DuckDB CTAS read_csv(foreign files)",
            lambda: _raw_load_script(foreign_raw_db, ds.foreign_glob, ", delim=';', decimal_separator=','"),
            prepare=lambda: _rm(foreign_raw_db),
            items=ds.foreign_rows,
        ),
        Step(
            "ingest_foreign",
            "`tubetrack ingest` foreign layout via profile",
            lambda: [*tt, "ingest", str(ds.foreign_dir), "--db", str(foreign_db), *quiet_flag],
            floor="raw_load_foreign",
            prepare=lambda: _rm(foreign_db),
            available=lambda: cli_missing("ingest") or (None if (ds.foreign_dir / "profiles").exists() else "harrowgate profile not present yet"),
            items=ds.foreign_rows,
        ),
        Step(
            "tubes",
            "`tubetrack tubes` full health analysis",
            lambda: [*tt, "tubes", "--db", str(full_db), "--format", "csv"],
            floor="raw_load",
            target=Target("ratio", 5.0, 2048, "<= 5x floor, peak <= 2 GiB"),
            available=lambda: cli_missing("tubes") or (None if full_db.exists() else "no full store (ingest failed)"),
            heavy=True,
        ),
        Step(
            "fleet_forecast",
            "`tubetrack fleet forecast`",
            lambda: [*tt, "fleet", "forecast", "--db", str(full_db), "--format", "csv"],
            floor="raw_load",
            available=lambda: cli_missing("fleet", "forecast") or (None if full_db.exists() else "no full store"),
            heavy=True,
        ),
        Step(
            "report",
            "`tubetrack report` whole fleet",
            lambda: [*tt, "report", "--db", str(full_db), "--out", str(report_dir)],
            target=Target("abs_s", 30.0, None, "<= 30 s"),
            prepare=lambda: _rm(report_dir),
            available=lambda: cli_missing("report") or (None if full_db.exists() else "no full store"),
            heavy=True,
        ),
        Step(
            "dicom",
            "`tubetrack ingest` 10,000 DICOM headers",
            lambda: [*tt, "ingest", str(dicom_dir), "--db", str(dicom_db), *quiet_flag],
            prepare=prep_dicom,
            available=lambda: cli_missing("ingest") or module_missing("tubetrack.ingest.dicom_synth", "write_dicom_workload"),
            items=10_000,
        ),
        Step(
            "export_lake",
            "`tubetrack export-lake` (Parquet by month)",
            lambda: [*tt, "export-lake", "--db", str(full_db), "--out", str(lake), *quiet_flag],
            floor="raw_load",
            prepare=lambda: _rm(lake),
            available=lambda: cli_missing("export-lake") or (None if full_db.exists() else "no full store"),
            items=ds.n_exposures,
        ),
        Step(
            "engine_local",
            "health on the lake, local engine (DuckDB + process pool)",
            lambda: [PY, "-c", engine_code, "local", str(lake)],
            available=lambda: module_missing("tubetrack.engines", "run_health") or (None if lake.exists() else "no lake"),
            heavy=True,
            optional=True,
        ),
        Step(
            "engine_spark",
            "health on the lake, Spark local[2]",
            lambda: [PY, "-c", engine_code, "spark", str(lake)],
            floor="engine_local",
            available=lambda: module_missing("tubetrack.engines", "run_health") or module_missing("pyspark") or (None if lake.exists() else "no lake"),
            heavy=True,
            optional=True,
        ),
    ]
    return steps


def _make_dicom(ds: Dataset, out: Path, n: int) -> None:
    """Write ``n`` small DICOM headers with the DICOM worker's synthesiser (in a child)."""
    if out.exists():
        shutil.rmtree(out)
    out.mkdir(parents=True)
    code = (
        "import sys,duckdb;from pathlib import Path;"
        "from tubetrack.ingest.dicom_synth import write_dicom_workload;"
        "con=duckdb.connect();con.execute(\"SET TimeZone='UTC'\");"
        "e=con.execute(\"SELECT * REPLACE (CAST(timestamp_utc AS TIMESTAMP) AS timestamp_utc) FROM read_csv('\"+sys.argv[1]+\"') ORDER BY timestamp_utc DESC LIMIT \"+sys.argv[3]).df();"
        "s=con.execute(\"SELECT * FROM read_csv('\"+sys.argv[4]+\"')\").df();"
        "s=s[s.system_id.isin(e.system_id.unique())];"
        "write_dicom_workload(e, s, Path(sys.argv[2]), 7)"
    )
    subprocess.run(
        [PY, "-c", code, ds.exposure_glob, str(out), str(n), str(ds.open_dir / "inventory" / "systems.csv")],
        check=True,
        cwd=REPO_ROOT,
        env=_env(),
    )
    (out / ".done").write_text("ok")


# ----------------------------------------------------------------------------- running


def run_steps(steps: list[Step], repeat: int, *, only: set[str] | None, log: Callable[[str], None], timeout_s: float, repeat_heavy: int = 1, with_optional: bool = True) -> list[Result]:
    results: dict[str, Result] = {}
    for step in steps:
        res = Result(step)
        results[step.name] = res
        if only and step.name not in only:
            res.status, res.reason = "skipped", "not selected"
            continue
        if not only and step.optional and not with_optional:
            res.status, res.reason = "skipped", f"opt-in at this size (--steps {step.name})"
            log(f"  {step.name:<18} skipped: opt-in at this size")
            continue
        reason = step.available()
        if reason:
            res.status, res.reason = "not available", reason
            log(f"  {step.name:<18} not available: {reason}")
            continue
        for i in range(step.repeat or (repeat_heavy if step.heavy else repeat)):
            if step.prepare:
                try:
                    step.prepare()
                except Exception as exc:  # noqa: BLE001 - a broken step never stops the bench
                    res.status, res.reason = "failed", f"preparation failed: {exc}"
                    break
            m = run_measured(step.argv(), cwd=REPO_ROOT, env=_env(), timeout_s=timeout_s, stdout_path=step.stdout)
            res.runs.append(m)
            log(f"  {step.name:<18} run {i + 1}: {m.wall_s:8.2f} s  cpu {m.cpu_s:8.2f} s  peak {m.peak_rss_mib:7.0f} MiB  tree {m.tree_rss_mib:7.0f} MiB  rc={m.returncode}")
            if m.returncode != 0:
                res.status = "timeout" if m.returncode == -9 else "failed"
                res.reason = f"exit code {m.returncode}: " + _last_line(m.stderr_tail)
                break
            if step.after:
                step.after()
    return list(results.values())


def _last_line(text: str) -> str:
    lines = [ln.strip() for ln in text.strip().splitlines() if ln.strip()]
    return lines[-1][:300] if lines else ""


# ----------------------------------------------------------------------------- reporting


def machine_info() -> dict[str, str]:
    mem_kib = 0
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal:"):
                mem_kib = int(line.split()[1])
    except OSError:
        pass
    cpu = platform.processor() or ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    try:
        usable = len(os.sched_getaffinity(0))
    except AttributeError:
        usable = os.cpu_count() or 0
    import duckdb

    try:
        commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], capture_output=True, text=True, cwd=REPO_ROOT).stdout.strip()
    except OSError:
        commit = "?"
    try:
        load = " ".join(f"{x:.1f}" for x in os.getloadavg())
    except OSError:
        load = "?"
    return {
        "load average at the end (1, 5, 15 min)": load,
        "date (UTC)": dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M"),
        "cpu": cpu,
        "cores usable": str(usable),
        "memory": f"{mem_kib / 1024 / 1024:.1f} GiB",
        "os": platform.platform(),
        "python": platform.python_version(),
        "duckdb": duckdb.__version__,
        "git commit": commit or "?",
    }


def _fmt(v: float | None, spec: str) -> str:
    return "-" if v is None else format(v, spec)


def table_rows(results: list[Result]) -> list[list[str]]:
    by = {r.step.name: r for r in results}
    rows = []
    for r in results:
        if r.status == "skipped":
            continue
        s = r.step
        floor = by.get(s.floor) if s.floor else None
        floor_s = floor.wall_s if floor else None
        wall = r.wall_s
        ratio = wall / floor_s if (wall is not None and floor_s) else None
        met = ""
        if r.status != "ok":
            met = r.status
        elif s.target.kind == "ratio" and ratio is not None:
            ok = ratio <= s.target.limit and (s.target.peak_mib is None or (r.peak_mib or 0) <= s.target.peak_mib)
            met = "met" if ok else "NOT met"
        elif s.target.kind == "abs_s" and wall is not None:
            ok = wall <= s.target.limit and (s.target.peak_mib is None or (r.peak_mib or 0) <= s.target.peak_mib)
            met = "met" if ok else "NOT met"
        elif s.target.kind == "ratio":
            met = "no floor"
        rate = f"{s.items / wall:,.0f}/s" if (s.items and wall) else "-"
        rows.append(
            [
                s.name,
                s.label,
                _fmt(wall, ".2f") if r.status == "ok" else r.status,
                f"{len([m for m in r.runs if m.returncode == 0])}",
                _fmt(r.cpu_s, ".2f"),
                _fmt(r.peak_mib, ".0f"),
                _fmt(r.tree_mib, ".0f"),
                rate,
                s.floor or "-",
                _fmt(floor_s, ".2f"),
                _fmt(ratio, ".3f"),
                s.target.text,
                met,
            ]
        )
    return rows


HEADER = ["step", "what", "median s", "n", "cpu s", "peak MiB", "tree MiB", "rate", "floor", "floor s", "ratio", "target", "result"]


def render_text(rows: list[list[str]]) -> str:
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(HEADER)]
    show = [0, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12]
    line = "  ".join(HEADER[i].ljust(widths[i]) for i in show)
    out = [line, "-" * len(line)]
    out += ["  ".join(r[i].ljust(widths[i]) for i in show) for r in rows]
    return "\n".join(out)


def render_markdown(ds: Dataset, results: list[Result], info: dict[str, str], args_text: str, total_s: float) -> str:
    rows = table_rows(results)
    md = [BEGIN, "", "## Latest run", ""]
    md += [f"- **{k}**: {v}" for k, v in info.items()]
    md += [
        f"- **command**: `python -m bench {args_text}`".rstrip(),
        f"- **bench wall time**: {total_s / 60:.1f} min (data generation {ds.generate_s:.1f} s, writing {ds.write_s:.1f} s)",
        f"- **data** ({ds.source} fleet): {ds.n_systems:,} systems, {ds.n_tubes:,} tubes, "
        f"{ds.n_exposures:,} exposures in the full load ({ds.exposure_csv_bytes / 2**20:,.0f} MiB of CSV), "
        f"{ds.n_exposures_increment:,} in the one-day increment; foreign layout: {ds.foreign_rows:,} rows "
        f"({ds.foreign_bytes / 2**20:,.1f} MiB)",
    ]
    md += [f"- note: {n}" for n in ds.notes]
    md += ["", "| " + " | ".join(HEADER) + " |", "|" + "---|" * len(HEADER)]
    md += ["| " + " | ".join(c.replace("|", "\\|") for c in r) + " |" for r in rows]
    md += [
        "",
        "Figures: median wall time over the successful runs (`n`); `cpu s` the median user + system "
        "CPU time of the step's processes (steadier than wall time on a shared machine); `peak MiB` is the largest single "
        "process (ru_maxrss via `/usr/bin/time -v`), `tree MiB` the largest sampled sum over the "
        "step's process tree (worker pools, Spark's JVM) of proportional set sizes (a page shared after fork counts once in the sum). `ratio` = median / floor median, measured in "
        "this run on the same files.",
        "",
    ]
    problems = [r for r in results if r.status not in ("ok", "skipped")]
    if problems:
        md += ["Steps not measured:", ""]
        md += [f"- `{r.step.name}`: {r.status}: {r.reason}" for r in problems]
        md.append("")
    md.append(END)
    return "\n".join(md)


def write_results_md(path: Path, block: str) -> None:
    """Replace the generated block of ``path`` and keep the hand-written rest (profiling notes)."""
    if path.exists():
        text = path.read_text()
        if BEGIN in text and END in text:
            head, rest = text.split(BEGIN, 1)
            _, tail = rest.split(END, 1)
            path.write_text(head + block + tail)
            return
        path.write_text(text.rstrip() + "\n\n" + block + "\n")
        return
    path.write_text("# tubetrack benchmark results\n\n" + block + "\n")


#: The fleet size whose figures bench/RESULTS.md records (issue 9's targets are stated for it).
FULL_SIZE = (5000, 10_000_000)


def default_results_path(n_tubes: int, n_exposures: int) -> Path:
    """Where a run writes its results when ``--results`` is not given: the recorded
    ``bench/RESULTS.md`` for the full default size, a git-ignored file under ``bench/out/``
    named by the size for any other (a ``--small`` smoke run must not replace the full run)."""
    if (n_tubes, n_exposures) == FULL_SIZE:
        return REPO_ROOT / "bench" / "RESULTS.md"
    return REPO_ROOT / "bench" / "out" / f"RESULTS-t{n_tubes}_e{n_exposures}.md"


def main(argv: list[str] | None = None) -> int:
    import argparse
    import time

    ap = argparse.ArgumentParser(prog="python -m bench", description="tubetrack benchmark suite (issue 9).")
    ap.add_argument("--small", action="store_true", help="CI-sized run: 300 tubes, 500,000 exposures.")
    ap.add_argument("--tubes", type=int, default=None, help="Fleet size [tubes]. Default 5,000 (300 with --small).")
    ap.add_argument("--exposures", type=int, default=None, help="Exposures in the full load [rows]. Default 10,000,000 (500,000 with --small).")
    ap.add_argument("--repeat", type=int, default=None, help="Runs per step; the median is reported. Default 3 (2 for the full size).")
    ap.add_argument("--repeat-heavy", type=int, default=1, help="Runs of the whole-fleet analyses (tubes, fleet forecast, report, engines). Default 1.")
    ap.add_argument("--data", type=Path, default=REPO_ROOT / "bench" / "data", help="Folder for generated data (git-ignored). Default bench/data.")
    ap.add_argument("--results", type=Path, default=None, help="Markdown results file. Default bench/RESULTS.md for the full default size, bench/out/RESULTS-<size>.md (git-ignored) for any other size, so a quick run never overwrites the recorded full run.")
    ap.add_argument("--steps", default="", help="Comma-separated step names to run (default all; above the --small size the engine comparison engine_local,engine_spark runs only when named here).")
    ap.add_argument("--stand-in", action="store_true", help="Use the stand-in fleet even when the demo generator exists.")
    ap.add_argument("--timeout", type=float, default=1800.0, help="Kill a step after this long [s]. Default 1800.")
    args = ap.parse_args(argv)

    n_tubes = args.tubes or (300 if args.small else 5000)
    n_exp = args.exposures or (500_000 if args.small else 10_000_000)
    repeat = args.repeat or (3 if (args.small or n_exp <= 2_000_000) else 2)
    t0 = time.perf_counter()

    def log(msg: str) -> None:
        print(msg, file=sys.stderr, flush=True)

    tag = f"t{n_tubes}_e{n_exp}" + ("_standin" if args.stand_in else "")
    data_root = args.data / tag
    log(f"bench: generating data ({n_tubes:,} tubes, {n_exp:,} exposures) under {data_root} ...")
    ds = build_dataset(data_root, n_tubes=n_tubes, n_exposures=n_exp, force_stand_in=args.stand_in)
    log(f"bench: {ds.source} fleet: {ds.n_tubes:,} tubes, {ds.n_exposures:,} exposures, generated in {ds.generate_s:.1f} s, written in {ds.write_s:.1f} s")
    work = args.data / (tag + "_work")
    if work.exists():
        shutil.rmtree(work)
    work.mkdir(parents=True)
    quiet = ["--quiet"] if cli_has_option("--quiet", "ingest") else []
    steps = build_steps(ds, work, quiet_flag=quiet)
    only = {s.strip() for s in args.steps.split(",") if s.strip()} or None
    # the engine comparison repeats the whole health analysis twice (Spark ~4x slower on two
    # cores): part of the --small run, opt-in at larger sizes so the full run fits its time
    results = run_steps(steps, repeat, only=only, log=log, timeout_s=args.timeout, repeat_heavy=args.repeat_heavy,
                        with_optional=args.small)
    rows = table_rows(results)
    print(render_text(rows))
    total = time.perf_counter() - t0
    args_text = " ".join(a for a in (argv if argv is not None else sys.argv[1:]))
    block = render_markdown(ds, results, machine_info(), args_text, total)
    out = args.results or default_results_path(n_tubes, n_exp)
    out.parent.mkdir(parents=True, exist_ok=True)
    write_results_md(out, block)
    log(f"bench: wrote {out} ({total / 60:.1f} min)")
    return 0
