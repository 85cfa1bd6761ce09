"""Shared CLI plumbing: output formats, formula-safe CSV, JSON cleaning, error handling."""

from __future__ import annotations

import json
import math

import pandas as pd
import pytest
import typer
from typer.testing import CliRunner

from tubetrack.cli import app
from tubetrack.cli.common import (
    OutputFormat,
    csv_safe_cell,
    emit,
    handle_errors,
    records,
)
from tubetrack.errors import InputError


@pytest.mark.parametrize(
    "cell, expected",
    [
        ("=HYPERLINK(\"http://x\")", "'=HYPERLINK(\"http://x\")"),
        ("+1+1", "'+1+1"),
        ("-2+3", "'-2+3"),
        ("@SUM(A1)", "'@SUM(A1)"),
        ("plain", "plain"),
        (-3.5, -3.5),  # a negative number is data, not a formula
    ],
)
def test_csv_cells_starting_a_formula_are_neutralised(cell, expected):
    # Source: OWASP, "CSV Injection" (formula-trigger characters = + - @ tab CR)
    assert csv_safe_cell(cell) == expected


def test_records_turn_nan_and_times_into_json_values():
    frame = pd.DataFrame(
        {
            "t": pd.to_datetime(["2024-01-02T03:04:05", None]),
            "x": [1.5, math.nan],
            "s": ["a", None],
        }
    )
    out = records(frame)
    assert out == [
        {"t": "2024-01-02T03:04:05", "x": 1.5, "s": "a"},
        {"t": None, "x": None, "s": None},
    ]
    json.dumps(out)  # serialisable without a custom encoder


def test_emit_json_and_csv(capsys):
    frame = pd.DataFrame({"tube_id": ["=cmd", "T2"], "rul_days_p50": [10.0, None]})
    emit(frame, OutputFormat.json)
    assert json.loads(capsys.readouterr().out) == [
        {"tube_id": "=cmd", "rul_days_p50": 10.0},
        {"tube_id": "T2", "rul_days_p50": None},
    ]
    emit(frame, OutputFormat.csv)
    lines = capsys.readouterr().out.splitlines()
    assert lines[0] == "tube_id,rul_days_p50"
    assert lines[1] == "'=cmd,10.0"


def test_emit_table_keeps_markup_inert(capsys):
    emit(pd.DataFrame({"site": ["[bold red]x[/] <script>"]}), OutputFormat.table)
    assert "[bold red]x[/] <script>" in capsys.readouterr().out


def test_empty_json_is_an_empty_array(capsys):
    emit(pd.DataFrame({"a": []}), OutputFormat.json)
    assert json.loads(capsys.readouterr().out) == []


def test_user_errors_exit_1_with_message():
    sub = typer.Typer()

    @sub.command()
    @handle_errors
    def boom() -> None:
        raise InputError("file x line 3: bad value. Fix it.")

    result = CliRunner().invoke(sub, [])
    assert result.exit_code == 1
    assert "Error: file x line 3: bad value. Fix it." in result.output


def test_version_and_help():
    runner = CliRunner()
    assert runner.invoke(app, ["--version"]).output.startswith("tubetrack ")
    result = runner.invoke(app, ["--help"])
    assert result.exit_code == 0
    assert "qualified personnel" in result.output
