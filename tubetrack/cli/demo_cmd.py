"""``tubetrack demo``: regenerate the invented demo fleet's sample logs."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from tubetrack.cli.common import (
    FormatOption,
    OutputFormat,
    QuietOption,
    emit,
    handle_errors,
    stderr,
)


def register(app: typer.Typer) -> None:
    """Add ``tubetrack demo`` to ``app``."""

    @app.command("demo")
    @handle_errors
    def demo(
        out: Annotated[
            Path, typer.Option("--out", help="Folder to write the sample logs into. Default: sample_logs.")
        ] = Path("sample_logs"),
        seed: Annotated[
            int, typer.Option("--seed", help="Random seed; the same seed gives identical files. Default: 20261202.")
        ] = 20261202,
        systems: Annotated[
            int, typer.Option("--systems", min=1, help="Number of X-ray systems [count]. Default: 24.")
        ] = 24,
        years: Annotated[
            float, typer.Option("--years", min=0.1, help="Span of the logs [years]. Default: 3.2.")
        ] = 3.2,
        fmt: FormatOption = OutputFormat.table,
        quiet: QuietOption = False,
    ) -> None:
        """Generate the invented demo fleet (a fictional hospital group) and write its logs.

        Writes our own log layout, the foreign layout of the Harrowgate Valley Clinic site, the
        DICOM workload of the DICOM-only site (when the DICOM writer is available), the truth
        files and a README describing the scenario and its deliberately bad rows. Deterministic
        for a given seed. Prints every file written.
        """
        import pandas as pd

        from tubetrack.demo import generate_fleet, write_sample_logs

        stderr(f"generating {systems} systems over {years:g} years (seed {seed}) ...", quiet)
        fleet = generate_fleet(
            seed=seed,
            n_systems=systems,
            years=years,
            progress=None if quiet else (lambda m: stderr(m)),
        )
        paths = write_sample_logs(fleet, out)
        frame = pd.DataFrame(
            {
                "path": [str(p) for p in paths],
                "bytes": [p.stat().st_size if p.exists() else 0 for p in paths],
            }
        )
        emit(frame, fmt)
        fresh = {p.resolve() for p in paths}
        stale = sorted(
            p
            for p in out.rglob("*")
            if p.is_file() and p.resolve() not in fresh and "profiles" not in p.relative_to(out).parts
        )
        if stale:
            stderr(
                f"warning: {len(stale)} older files in {out} were not rewritten by this run "
                f"(e.g. {stale[0]}); delete them or write to an empty --out folder.",
                quiet,
            )
        t = fleet.truth
        stderr(
            f"wrote {len(paths)} files ({frame['bytes'].sum() / 1e6:.2f} MB) to {out}: "
            f"{len(fleet.systems)} systems, {len(fleet.tubes)} tubes, {len(fleet.exposures):,} exposures, "
            f"{int((t['true_cause'] == 'filament').sum())} filament failures",
            quiet,
        )
