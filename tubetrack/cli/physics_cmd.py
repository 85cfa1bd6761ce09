"""``tubetrack filament``: filament operating points for engineers checking a circuit."""

from __future__ import annotations

from enum import StrEnum
from typing import Annotated

import typer

from tubetrack.cli.common import FormatOption, OutputFormat, emit, handle_errors


class FocalSpot(StrEnum):
    """Focal spot (filament) choices."""

    small = "small"
    large = "large"


_HELP = (
    "Filament operating points: for each tube current (mA) and tube voltage (kV), the filament "
    "temperature, current and voltage a tungsten filament needs (Richardson-Dushman emission, "
    "Child-Langmuir space charge, Jones 1926 heat balance), the transformer primary voltage, the "
    "series drop and resistance that set it from the mains, and the tube current's sensitivity "
    "to mains fluctuation. With --series-resistance-ohm or --primary-drop-v it instead solves the "
    "circuit: what filament voltage, current and tube current a given series element gives. "
    "Nominal geometry unless you give the wire; results are model estimates for checking a "
    "design, not settings to apply to a generator. Service and calibration are done by qualified "
    "personnel following the manufacturer's procedures."
)


def register(app: typer.Typer) -> None:
    """Add the ``filament`` command to ``app``."""

    @app.command("filament", help=_HELP)
    @handle_errors
    def filament(
        focal_spot: Annotated[
            FocalSpot,
            typer.Option(
                "--focal-spot",
                help="Filament: small (0.22 mm wire) or large (0.30 mm wire). Default: large.",
            ),
        ] = FocalSpot.large,
        tube_current_ma: Annotated[
            list[float] | None,
            typer.Option(
                "--tube-current-ma",
                "--ma",
                help="Tube current [mA]; repeat for several stations. Default: 100, 200, 400 (small) "
                "or 200, 400, 600 (large).",
                show_default=False,
            ),
        ] = None,
        tube_voltage_kv: Annotated[
            list[float] | None,
            typer.Option(
                "--kv",
                help="Tube voltage [kV]; repeat for several. Default: 80.",
                show_default=False,
            ),
        ] = None,
        diameter_mm: Annotated[
            float | None,
            typer.Option(
                "--diameter-mm",
                help="Wire diameter of the new filament [mm]. Default: 0.22 (small) or 0.30 (large).",
                show_default=False,
            ),
        ] = None,
        length_mm: Annotated[
            float | None,
            typer.Option(
                "--length-mm",
                help="Wire length between the legs, uncoiled [mm]. Default: 95 (small) or 120 (large).",
                show_default=False,
            ),
        ] = None,
        diameter_ratio: Annotated[
            float,
            typer.Option(
                "--diameter-ratio",
                help="Aged wire: current diameter / new diameter [1]. Default: 1.0.",
            ),
        ] = 1.0,
        mains_v: Annotated[
            float,
            typer.Option(
                "--mains-v",
                help="Mains voltage feeding the filament circuit [V rms]. Default: 230.",
            ),
        ] = 230.0,
        turns_ratio: Annotated[
            float,
            typer.Option(
                "--turns-ratio",
                help="Filament transformer turns ratio Np/Ns [1]. Default: 20 (240 V -> 12 V).",
            ),
        ] = 20.0,
        series_resistance_ohm: Annotated[
            float | None,
            typer.Option(
                "--series-resistance-ohm",
                help="Solve the circuit for this resistance in series with the primary [ohm]. Default: none "
                "(report the resistance each station needs).",
                show_default=False,
            ),
        ] = None,
        primary_drop_v: Annotated[
            float | None,
            typer.Option(
                "--primary-drop-v",
                help="Solve the circuit for this voltage dropped by the series element [V]. Default: none.",
                show_default=False,
            ),
        ] = None,
        fmt: FormatOption = OutputFormat.table,
    ) -> None:
        import numpy as np
        import pandas as pd

        from tubetrack.errors import InputError
        from tubetrack.physics import (
            default_filament_spec,
            filament_circuit_operating_point,
            filament_operating_point,
            mains_sensitivity,
            series_resistance_for_filament_voltage_ohm,
        )

        spec = default_filament_spec(focal_spot.value)
        changes: dict[str, float] = {"turns_ratio": turns_ratio}
        if diameter_mm is not None:
            changes["diameter_m"] = diameter_mm * 1e-3
        if length_mm is not None:
            changes["length_m"] = length_mm * 1e-3
        for name, value in (
            ("--mains-v", mains_v),
            ("--diameter-ratio", diameter_ratio),
        ):
            if not value > 0:
                raise InputError(f"{name} is {value!r}; it must be > 0.")
        spec = spec.replace(**changes)
        kvs = np.asarray(tube_voltage_kv or [80.0], dtype=float)

        if series_resistance_ohm is not None or primary_drop_v is not None:
            frame = filament_circuit_operating_point(
                spec,
                mains_v,
                kvs,
                series_resistance_ohm=0.0
                if series_resistance_ohm is None
                else series_resistance_ohm,
                primary_drop_v=primary_drop_v,
                diameter_ratio=diameter_ratio,
            )
            if primary_drop_v is None:
                sens = mains_sensitivity(
                    spec, mains_v, kvs, series_resistance_ohm=series_resistance_ohm
                )
                frame["dln_tube_current_dln_mains"] = sens[
                    "dln_tube_current_dln_mains"
                ].to_numpy()
            frame.insert(0, "focal_spot", spec.focal_spot)
            emit(
                frame,
                fmt,
                title="Filament circuit operating point (model)",
                columns=[
                    "focal_spot",
                    "mains_v",
                    "primary_voltage_v",
                    "filament_voltage_v",
                    "filament_current_a",
                    "filament_temperature_k",
                    "tube_current_ma",
                    "tube_voltage_kv",
                ],
            )
            return

        default_ma = (
            [100.0, 200.0, 400.0]
            if spec.focal_spot == "small"
            else [200.0, 400.0, 600.0]
        )
        mas = np.asarray(tube_current_ma or default_ma, dtype=float)
        ma_grid, kv_grid = (a.ravel() for a in np.meshgrid(mas, kvs, indexing="ij"))
        op = filament_operating_point(spec, ma_grid, kv_grid, diameter_ratio)
        r_series = np.asarray(
            series_resistance_for_filament_voltage_ohm(
                mains_v,
                op["filament_voltage_v"].to_numpy(),
                op["filament_current_a"].to_numpy(),
                turns_ratio,
            ),
            dtype=float,
        )
        sens = mains_sensitivity(spec, mains_v, kv_grid, series_resistance_ohm=r_series)
        frame = pd.DataFrame(
            {
                "focal_spot": op["focal_spot"],
                "tube_current_ma": op["tube_current_ma"],
                "tube_voltage_kv": op["tube_voltage_kv"],
                "filament_temperature_k": op["filament_temperature_k"],
                "filament_current_a": op["filament_current_a"],
                "filament_voltage_v": op["filament_voltage_v"],
                "filament_power_w": op["filament_power_w"],
                "primary_voltage_v": op["primary_voltage_v"],
                "series_drop_v": mains_v - op["primary_voltage_v"],
                "series_resistance_ohm": r_series,
                "dln_tube_current_dln_mains": sens[
                    "dln_tube_current_dln_mains"
                ].to_numpy(),
                "space_charge_current_ma": op["space_charge_current_ma"],
            }
        )
        emit(
            frame,
            fmt,
            title="Filament operating points (model; - = not deliverable)",
            columns=[
                "focal_spot",
                "tube_current_ma",
                "tube_voltage_kv",
                "filament_temperature_k",
                "filament_current_a",
                "filament_voltage_v",
                "series_resistance_ohm",
                "dln_tube_current_dln_mains",
            ],
        )
