"""Sample-log files: layout of the sample_logs tree, foreign layout round trip, bad rows, size, CLI."""

from __future__ import annotations

import gzip
import io
import json
from datetime import UTC, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from tubetrack.cli import app
from tubetrack.demo.writer import BAD_ROWS, EXPOSURE_COLUMNS, FOREIGN_HEADER

REPO = Path(__file__).resolve().parents[2]
SAMPLE = REPO / "sample_logs"
BERLIN = ZoneInfo("Europe/Berlin")


def _read_text(path: Path) -> str:
    raw = path.read_bytes()
    if path.name.endswith(".gz"):
        raw = gzip.decompress(raw)
    return raw.decode("utf-8")


def _foreign_to_utc(frame: pd.DataFrame) -> list[datetime | None]:
    """Local day-first Europe/Berlin times -> naive UTC with Python zoneinfo.

    Source: IANA tz database (Europe/Berlin: CET/CEST, changes at 01:00 UTC on the last Sundays of
    March and October). A local time seen again after a later one (the repeated autumn hour) is
    the second occurrence (fold=1), as the rows are in time order. A time in the spring gap does
    not exist: None.
    """
    out: list[datetime | None] = []
    prev: datetime | None = None
    second_pass = False
    for d, t in zip(frame["Datum"], frame["Zeit"], strict=True):
        local = datetime.strptime(f"{d} {t}", "%d.%m.%Y %H:%M:%S")
        if prev is None or local.date() != prev.date() or local.hour != 2:
            second_pass = False
        if prev is not None and local <= prev and local.date() == prev.date():
            second_pass = True  # the clock went back: second pass through the repeated hour
        aware = local.replace(tzinfo=BERLIN, fold=1 if second_pass else 0)
        utc = aware.astimezone(UTC)
        # round trip: a non-existent (spring gap) local time does not come back unchanged
        back = utc.astimezone(BERLIN).replace(tzinfo=None)
        out.append(utc.replace(tzinfo=None) if back == local else None)
        prev = local
    return out


def test_tree_follows_the_sample_logs_layout(small_logs, small_fleet):
    out, paths = small_logs
    names = {str(p.relative_to(out)) for p in paths}
    assert {"inventory/systems.csv", "inventory/tubes.csv", "truth.csv", "README.md"} <= names
    gen = small_fleet.meta["systems_gen"]
    for r in gen.itertuples():
        if not r.gen_site_exports_logs:
            assert not any(n.startswith(f"{r.site}/exposures") for n in names)
        elif r.gen_foreign_layout:
            assert any(n.startswith(f"{r.site}/genlog_{r.system_id}_") for n in names)
        else:
            assert f"{r.site}/exposures-{r.system_id}.csv.gz" in names
            assert f"{r.site}/calibrations-{r.system_id}.csv" in names


def test_own_layout_header_and_rows(small_logs, small_fleet):
    out, _ = small_logs
    path = next(out.glob("*/exposures-*.csv.gz"))
    frame = pd.read_csv(io.StringIO(_read_text(path)), dtype=str, keep_default_na=False)
    assert list(frame.columns) == EXPOSURE_COLUMNS
    ts = frame["timestamp_utc"]
    assert ts.str.match(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z$").mean() > 0.99
    sid = frame["system_id"].iloc[0]
    n_fleet = int((small_fleet.exposures["system_id"] == sid).sum())
    assert len(frame) in (n_fleet, n_fleet + 1)  # + 1 when a deliberately bad row went in


def test_foreign_layout_bytes(small_logs):
    out, _ = small_logs
    path = next(out.glob("harrowgate/genlog_*.csv.gz"))
    raw = gzip.decompress(path.read_bytes())
    assert raw.startswith("\ufeff".encode())  # UTF-8 byte order mark
    header = raw.decode("utf-8-sig").splitlines()[0]
    assert header == ";".join(FOREIGN_HEADER)
    rows = raw.decode("utf-8-sig").splitlines()[1:50]
    assert all(r.count(";") == 9 for r in rows)
    assert any("," in r.split(";")[6] for r in rows)  # decimal comma in the exposure time


def test_foreign_local_times_round_trip_to_utc(small_logs, small_fleet):
    out, _ = small_logs
    e = small_fleet.exposures
    checked = 0
    for path in sorted(out.glob("harrowgate/genlog_*.csv.gz")):
        frame = pd.read_csv(io.StringIO(_read_text(path)), sep=";", dtype=str, encoding="utf-8")
        frame.columns = [c.lstrip("\ufeff") for c in frame.columns]
        utc = _foreign_to_utc(frame)
        sid = frame["Anlage"].iloc[0]
        truth = e.loc[e["system_id"] == sid, "timestamp_utc"].dt.floor("s")
        truth = truth[truth.dt.tz_localize("UTC").dt.tz_convert(BERLIN).dt.year == int(path.name[-11:-7])]
        ok = frame["Fokus"].isin(["F1", "F2"]).to_numpy()  # the deliberately bad F9 row
        got = pd.Series(
            [u for u, k in zip(utc, ok, strict=True) if u is not None and k], dtype="datetime64[ns]"
        )
        assert sorted(got.astype("datetime64[s]").tolist()) == sorted(truth.astype("datetime64[s]").tolist())
        # heater current in mA is the fleet's A x 1000; Fokus F1/F2
        fleet_rows = e[e["system_id"] == sid].set_index(e.loc[e["system_id"] == sid, "timestamp_utc"].dt.floor("s"))
        ma = frame["Heizstrom_mA"].astype(float).to_numpy()[:20]
        np.testing.assert_allclose(ma[:20] / 1000.0, fleet_rows.loc[got[:20], "filament_current_a"].to_numpy(), atol=1e-9)
        checked += len(got)
    assert checked > 1000


def test_repeated_autumn_hour_present_and_resolved(small_fleet, tmp_path):
    # the foreign site's around-the-clock units log 02:10 and 02:40 local twice on each autumn
    # change: 00:10, 00:40 UTC (CEST, UTC+2) and 01:10, 01:40 UTC (CET, UTC+1)
    from tubetrack.demo.writer import foreign_exposures

    e = small_fleet.exposures
    gen = small_fleet.meta["systems_gen"]
    clock = gen.loc[gen["gen_foreign_layout"] & gen["gen_around_clock"], "system_id"]
    assert len(clock)
    x = e[e["system_id"].isin(clock)].sort_values("timestamp_utc")
    fx = foreign_exposures(x)
    day = "29.10.2023"
    sel = fx[(fx["Datum"] == day) & fx["Zeit"].str.startswith("02:")]
    assert sel["Zeit"].tolist()[:4] == ["02:10:00", "02:40:00", "02:10:00", "02:40:00"]
    utc = _foreign_to_utc(fx[fx["Datum"] == day].reset_index(drop=True))
    want = [datetime(2023, 10, 29, 0, 10), datetime(2023, 10, 29, 0, 40), datetime(2023, 10, 29, 1, 10), datetime(2023, 10, 29, 1, 40)]
    assert all(w in utc for w in want)


def test_spring_gap_bad_row_does_not_exist_locally():
    # Source: IANA tz database: on 2024-03-31 Europe/Berlin jumps from 02:00 CET to 03:00 CEST
    local = datetime(2024, 3, 31, 2, 30)
    back = local.replace(tzinfo=BERLIN).astimezone(UTC).astimezone(BERLIN).replace(tzinfo=None)
    assert back != local
    assert any(b.kind == "foreign" and "02:30" in b.value for b in BAD_ROWS)


def test_readme_lists_every_bad_row_at_its_line(small_logs):
    out, _ = small_logs
    text = (out / "README.md").read_text()
    assert "invented" in text.lower()
    rows = [line for line in text.splitlines() if line.startswith("| ") and ".csv" in line and "|" in line[2:]]
    listed = [r for r in rows if r.split("|")[2].strip().isdigit()]
    assert listed
    for r in listed:
        cells = [c.strip() for c in r.split("|")[1:-1]]
        file, line = cells[0], int(cells[1])
        lines = _read_text(out / file).lstrip("\ufeff").splitlines()
        bad_line = lines[line - 1]
        value = cells[3].strip("'")
        if cells[2] == "(whole row)":
            assert bad_line == lines[line - 2]
        elif cells[2] == "Zeit":
            assert bad_line.split(";")[:2] == value.split(" ")
        elif cells[2] == "end_utc":
            f = pd.read_csv(out / file)
            r_ = f.iloc[line - 2]
            assert r_["end_utc"] < r_["start_utc"]
        else:
            header = lines[0].split(";" if ";" in lines[0] else ",")
            sep = ";" if ";" in lines[0] else ","
            assert bad_line.split(sep)[header.index(cells[2])] == value, (file, line, bad_line)


def test_truth_files_written(small_logs, small_fleet):
    out, _ = small_logs
    truth = pd.read_csv(out / "truth.csv")
    assert len(truth) == len(small_fleet.tubes)
    for col in ("tube_id", "system_id", "failed_focal_spot", "removed_at_utc", "true_cause",
                "diameter_loss_small_at_end", "diameter_loss_large_at_end", "threshold_small", "threshold_large"):
        assert col in truth.columns
    weekly = pd.read_csv(out / "truth_diameter.csv.gz")
    assert set(weekly.columns) == {"tube_id", "focal_spot", "day", "diameter_loss"}
    assert weekly["diameter_loss"].between(0, 0.2).all()


def test_cli_demo_writes_and_reports(tmp_path):
    runner = CliRunner()
    res = runner.invoke(app, ["demo", "--out", str(tmp_path / "s"), "--systems", "5", "--years", "0.4",
                              "--seed", "3", "--format", "json", "--quiet"])
    assert res.exit_code == 0, res.output
    rows = json.loads(res.stdout)
    assert rows and all(Path(r["path"]).exists() for r in rows)
    assert any(r["path"].endswith("inventory/systems.csv") for r in rows)


def test_committed_sample_logs_small_and_complete():
    if not (SAMPLE / "truth.csv").exists():
        pytest.skip("sample_logs not generated yet")
    total = sum(p.stat().st_size for p in SAMPLE.rglob("*") if p.is_file())
    assert total < 4.5e6, total
    truth = pd.read_csv(SAMPLE / "truth.csv")
    assert (truth["true_cause"] == "filament").sum() >= 15
    assert {"bearing", "arcing"} & set(truth["true_cause"])
    assert truth["left_truncated"].sum() >= 20
    assert (SAMPLE / "harrowgate").is_dir() and list((SAMPLE / "harrowgate").glob("genlog_*_20??.csv*"))


def test_dst_and_month_end_downtime_present():
    if not (SAMPLE / "truth.csv").exists():
        pytest.skip("sample_logs not generated yet")
    dt = pd.concat([pd.read_csv(p, parse_dates=["start_utc", "end_utc"]) for p in SAMPLE.glob("*/downtime.csv")])
    dt = dt[dt["end_utc"] > dt["start_utc"]]
    month_end = dt["start_utc"].dt.month != dt["end_utc"].dt.month
    assert month_end.any()
    # times end in Z: read as aware UTC; offsets of Europe/Berlin at start and end differ
    # when the downtime spans a DST change (Source: IANA tz database)
    starts = dt["start_utc"].map(lambda t: t.astimezone(BERLIN).utcoffset())
    ends = dt["end_utc"].map(lambda t: t.astimezone(BERLIN).utcoffset())
    assert (starts != ends).any()
    assert set(starts) <= {timedelta(hours=1), timedelta(hours=2)}


def test_other_formats_carry_the_same_exposures(tmp_path):
    from tubetrack.demo import generate_fleet, write_sample_logs

    fleet = generate_fleet(seed=5, n_systems=3, years=0.3)
    paths = write_sample_logs(fleet, tmp_path, formats=("csv", "parquet"), bad_rows=False, dicom=False)
    csvs = sorted(p for p in paths if p.name.startswith("exposures-") and p.suffix == ".csv")
    assert csvs
    for c in csvs:
        a = pd.read_csv(c)
        b = pd.read_parquet(c.with_suffix(".parquet"))
        assert len(a) == len(b) > 0
        np.testing.assert_allclose(a["filament_current_a"], b["filament_current_a"])
        np.testing.assert_allclose(a["tube_voltage_kv"], b["tube_voltage_kv"])
        assert (pd.to_datetime(a["timestamp_utc"]).dt.tz_convert(None) == b["timestamp_utc"]).all()
