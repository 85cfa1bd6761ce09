"""Parameters of the tube-health analysis (one frozen object, stored with every result)."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field, replace
from typing import Any

from tubetrack.health.signatures import SignatureParams

#: End-of-life diameter loss when the fleet has too few filament failures to learn it: 10 % mass
#: loss of a uniformly thinning wire, 1 - sqrt(0.9) = 0.0513 (the physics module's default).
DEFAULT_EOL_DIAMETER_LOSS = 0.0513
#: Spread assumed for the default threshold (hot spots make real filaments fail earlier or later);
#: an assumption, stated in docs/health.md, replaced by the fleet's own spread when learned.
DEFAULT_EOL_DIAMETER_LOSS_SD = 0.006


@dataclass(frozen=True)
class HealthParams:
    """Tunable settings of :func:`tubetrack.health.analyse_fleet`.

    Attributes
    ----------
    baseline_days
        Window from a focal spot's first data used for the kV model and the baseline current [days].
    penalty_c
        Change-point penalty factor c in pen = c sigma^2 ln n [1].
    min_segment_days
        Minimum observations per segment [days with data].
    min_fit_days
        The wear fit uses the current segment, extended back to at least this span [days].
    min_history_days
        Below this span of filament data a tube is reported as having too little history [days].
    prior_k_mean, prior_k_sd
        Prior of the physics calibration factor k when the fleet cannot supply one [1].
    fleet_prior_min_tubes, fleet_prior_min_days
        The fleet's own prior of k (median and robust spread of the well-determined k of each
        focal spot) is used when at least this many filaments have this much history [count],
        [days].
    eol_diameter_loss, eol_diameter_loss_sd
        End-of-life threshold and its spread when not learned from the fleet [1].
    min_failures_for_threshold
        Filament failures needed before the fleet's own threshold is used [count].
    workload_sd
        Minimum log-scale spread of the future workload around the recent one; the tube's own
        quarter-to-quarter variation is used when larger [1].
    workload_sd_unknown
        Log-scale spread of the future workload when less than two full quarters are logged (the
        tube's pattern is not known yet) [1].
    recent_days
        Window of recent workload used for the projection [days]. It ends at the analysis date,
        or at the tube's newest logged day when its logs stopped (see ``stale_after_days``).
    stale_after_days
        A tube in service with no logged exposure in the last this-many days before the analysis date
        has *stopped logs* (an export that stopped arriving, or an analysis date past the data):
        the workload since its newest logged day is assumed to have gone on at its recent rate
        (with the workload's spread), the level is at least "observe" and the reason says so.
        Without this a silent tube would be forecast to last for ever [days].
    n_samples
        Monte Carlo samples per tube and focal spot [count].
    seed
        Random seed (results are reproducible) [1].
    max_rul_days
        Longest remaining life reported; longer is reported as this value [days].
    workers
        Processes for the per-tube step; 1 = serial [count].
    serial_below
        Fleets with fewer tubes than this run serially [count].
    signatures
        Thresholds of the non-filament signatures.
    """

    baseline_days: int = 30
    penalty_c: float = 3.0
    min_segment_days: int = 10
    min_fit_days: int = 180
    min_history_days: int = 90
    prior_k_mean: float = 1.0
    prior_k_sd: float = 0.5
    fleet_prior_min_tubes: int = 5
    fleet_prior_min_days: int = 120
    eol_diameter_loss: float = DEFAULT_EOL_DIAMETER_LOSS
    eol_diameter_loss_sd: float = DEFAULT_EOL_DIAMETER_LOSS_SD
    min_failures_for_threshold: int = 3
    workload_sd: float = 0.10
    workload_sd_unknown: float = 0.35
    recent_days: int = 90
    stale_after_days: int = 14
    n_samples: int = 2000
    seed: int = 20261202
    max_rul_days: float = 3650.0
    workers: int = 2
    serial_below: int = 40
    signatures: SignatureParams = field(default_factory=SignatureParams)

    def to_dict(self) -> dict[str, Any]:
        """Plain dict for storing with the results."""
        return asdict(self)

    def with_threshold(self, mean: float, sd: float) -> HealthParams:
        """Copy with another end-of-life threshold."""
        return replace(self, eol_diameter_loss=float(mean), eol_diameter_loss_sd=float(sd))
