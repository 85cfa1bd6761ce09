"""`tubetrack filament` through typer's CliRunner."""

from __future__ import annotations

import io
import json

import pandas as pd
import pytest
from typer.testing import CliRunner

from tubetrack.cli import app

runner = CliRunner()


def test_operating_points_json():
    res = runner.invoke(
        app,
        [
            "filament",
            "--focal-spot",
            "small",
            "--ma",
            "100",
            "--ma",
            "200",
            "--kv",
            "60",
            "--kv",
            "90",
            "--format",
            "json",
        ],
    )
    assert res.exit_code == 0, res.output
    rows = json.loads(res.stdout)
    assert len(rows) == 4
    assert {
        "filament_temperature_k",
        "filament_current_a",
        "filament_voltage_v",
        "series_resistance_ohm",
        "dln_tube_current_dln_mains",
    } <= set(rows[0])
    # common practice: 8-12 V at 4-8 A for normal stations
    for row in rows:
        assert 4.0 <= row["filament_current_a"] <= 8.0
        assert 8.0 <= row["filament_voltage_v"] <= 12.0
        # the series drop and the primary voltage add up to the mains (230 V default)
        assert row["series_drop_v"] + row["primary_voltage_v"] == pytest.approx(230.0)


def test_primary_drop_circuit_240_v_20_to_1():
    # common practice: 240 V mains, 20:1, a series element dropping 20 V -> 220 V primary, 11 V filament.
    res = runner.invoke(
        app,
        [
            "filament",
            "--mains-v",
            "240",
            "--turns-ratio",
            "20",
            "--primary-drop-v",
            "20",
            "--format",
            "json",
        ],
    )
    assert res.exit_code == 0, res.output
    row = json.loads(res.stdout)[0]
    assert row["primary_voltage_v"] == pytest.approx(220.0)
    assert row["filament_voltage_v"] == pytest.approx(11.0)


def test_series_resistance_csv_and_wire_options():
    res = runner.invoke(
        app,
        [
            "filament",
            "--series-resistance-ohm",
            "120",
            "--diameter-mm",
            "0.28",
            "--length-mm",
            "110",
            "--format",
            "csv",
        ],
    )
    assert res.exit_code == 0, res.output
    frame = pd.read_csv(io.StringIO(res.stdout))
    assert len(frame) == 1 and frame["tube_current_ma"].iloc[0] > 0
    assert frame["primary_current_a"].iloc[0] * 120 == pytest.approx(
        frame["series_drop_v"].iloc[0], rel=1e-3
    )


def test_bad_input_is_a_clean_error():
    res = runner.invoke(app, ["filament", "--mains-v", "0"])
    assert res.exit_code == 1
    assert "Error: --mains-v is 0.0" in res.output
    res = runner.invoke(app, ["filament", "--diameter-mm", "-0.2"])
    assert res.exit_code == 1 and "diameter_m" in res.output


def test_table_output_runs():
    res = runner.invoke(app, ["filament"])
    assert (
        res.exit_code == 0
        and "Filament operating points" in res.stdout
        and "large" in res.stdout
    )
