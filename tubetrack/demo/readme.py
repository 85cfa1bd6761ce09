"""The README written beside the sample logs: the invented scenario, the files, the bad rows."""

from __future__ import annotations

from typing import Any

import pandas as pd

from tubetrack.demo.generate import DemoFleet


def _table(frame: pd.DataFrame) -> str:
    cols = list(frame.columns)
    lines = ["| " + " | ".join(cols) + " |", "|" + "---|" * len(cols)]
    for row in frame.itertuples(index=False, name=None):
        lines.append("| " + " | ".join("" if pd.isna(v) else str(v) for v in row) + " |")
    return "\n".join(lines)


def readme_text(fleet: DemoFleet, bad_lines: list[dict[str, Any]], dicom_note: str, foreign_site: str) -> str:
    """Markdown describing the scenario (invented), the tree, the truth files and the bad rows."""
    m = fleet.meta
    sites = pd.DataFrame(m["sites"])
    sysn = fleet.systems.groupby("site").agg(
        systems=("system_id", "count"),
        radiographic=("modality", lambda s: int((s == "radiographic").sum())),
        mobile=("modality", lambda s: int((s == "mobile").sum())),
        fluoroscopy=("modality", lambda s: int((s == "fluoroscopy").sum())),
    )
    sites = sites.merge(sysn, left_on="slug", right_index=True)
    sites["exports"] = [
        "no generator logs; DICOM workload only" if not r.exports_logs
        else ("foreign layout (harrowgate profile)" if r.slug == foreign_site else "our own layout")
        for r in sites.itertuples()
    ]
    site_tab = sites[["slug", "name", "systems", "radiographic", "mobile", "fluoroscopy", "exports"]]
    t = fleet.truth
    causes = t["true_cause"].value_counts().rename_axis("true_cause").reset_index(name="tubes")
    bad = pd.DataFrame(
        [
            {"file": b["file"], "line": b["line"], "field": b["bad"].field or "(whole row)",
             "value": repr(b["bad"].value) if b["bad"].field else "", "what is wrong": b["bad"].why}
            for b in bad_lines
        ]
    )
    n_exp = len(fleet.exposures)
    return f"""# Sample logs of the demo fleet (invented)

Everything in this folder is **invented** by `tubetrack demo` for demonstrations and tests: the
{m["group"]}, its sites, systems, tube serials and all numbers are fiction. No real hospital,
person or product is described. Regenerate the folder exactly with

```
tubetrack demo --out sample_logs --seed {m["seed"]}
```

(`sample_logs/profiles/` belongs to the ingest layer and is not rewritten.)

## Scenario

The {m["group"]} runs {len(fleet.systems)} X-ray systems at {len(sites)} sites
(local time zone {m["timezone"]}). Logs span {m["start"]:%Y-%m-%d} to {m["end"]:%Y-%m-%d} (UTC),
{n_exp:,} exposures in all (the generators log a thinned sample of their exposures).

{_table(site_tab)}

Each tube's two filaments (small and large focal spot) age by tubetrack's filament physics
(`tubetrack.physics`) under the tube's own workload: the filament temperature needed for each
exposure's mA station and kV, evaporation of tungsten (Hertz-Knudsen-Langmuir) while the filament
is hot (prep/boost time plus exposure time), a per-tube hot-spot factor, and a burn-through
threshold drawn around the physics default (5.13 % diameter loss) with a 10 % spread. The
logged filament current is the physics current for the set mA and kV at the current diameter,
times a per-tube sensor gain (which steps at some recalibrations), plus 0.2 % noise, rounded to
1 mA. Rooms marked as hold-prep (long prep times) or high-mA (every program one station up) wear
out fast. Wear runs {m["wear_acceleration"]:g} times faster than the physics rate (a time-lapse so
that filaments burn through within the span at the thinned logged workload); the shape of the
drift is the physics'. Other tubes fail by bearing wear or arcing at random ages (Weibull), with
or without precursors (rising arc counts, rotor faults) that the filament signal cannot see. A
failed tube is replaced after a repair gap (downtime, cause `tube`). The first tube of each
system was installed before the logs begin (left truncation) with some wear already done.

Tube fates (truth):

{_table(causes)}

## Files

| path | layout | content |
|---|---|---|
| `inventory/systems.csv`, `inventory/tubes.csv` | own | systems; every tube with install/removal time, reason, price (EUR) |
| `<site>/exposures-<SYSTEM_ID>.csv.gz` | own | exposures, UTC ISO 8601 times; some sites leave `tube_id` empty (the store attributes it by dates) |
| `<site>/calibrations-<SYSTEM_ID>.csv` | own | filament table after each calibration (installation and preventive maintenance) |
| `<site>/events.csv` | own | faults: arcs, kV drop-outs, filament faults, rotor faults, overloads (our categories, invented raw codes) |
| `<site>/downtime.csv` | own | planned and unplanned downtime (some spanning month ends and DST changes) |
| `{foreign_site}/genlog_<SYSTEM_ID>_<YYYY>.csv.gz` | foreign (harrowgate profile) | `;`, decimal comma, BOM, day-first local Europe/Berlin time, F1/F2, ms, filament current in mA; read through `profiles/{foreign_site}.toml`. The repeated autumn hour appears on purpose (rows in time order) |
| `dicom/` | DICOM | {dicom_note} |
| `truth.csv` | truth | per tube: true end time and cause, failing focal spot, mean diameter loss at the end and at log start per focal spot, thresholds, hot-spot factors, sensor gains |
| `truth_diameter.csv.gz` | truth | weekly true mean diameter loss per tube and focal spot (fraction) |
| `truth_steps.csv` | truth | recalibrations that stepped the logged filament current (sensor gain before/after) |

Files named `truth*` and `README*` are never ingested.

## Deliberately bad rows

These rows are broken on purpose so that rejects (and one duplicate) show up in the ingest
reconciliation. Line numbers count the header as line 1 (decompressed file).

{_table(bad) if len(bad) else "(none)"}
"""
