"""The settings of each stage: frozen dataclasses with defaults, units in names or comments.

Every field here is a key in ``configs/default.toml`` under the section of the same name.
Validation of values lives in ``__post_init__`` so that a wrong value is refused before any work.
"""
from __future__ import annotations

from dataclasses import dataclass


#: Longest forecast horizon accepted (days): about 5 years after the last fitted session.
MAX_FORECAST_DAYS = 1826.0


def _require(condition: bool, message: str) -> None:
    if not condition:
        raise ValueError(message)


@dataclass(frozen=True)
class VolumeSettings:
    """Stage 1: connected components of a label mask."""

    connectivity: int = 26            # 6 (faces), 18 (faces+edges) or 26 (faces+edges+corners)
    min_volume_mm3: float = 0.0       # components smaller than this are dropped; 0 keeps a voxel
    max_memory_mb: float = 2048.0     # refuse a mask whose array would need more than this
    accept_unknown_orientation: bool = False  # sform_code = qform_code = 0: refuse unless true
    affine_tolerance_mm: float = 0.01  # sform/qform disagreement (mm) that warns
    measurable_min_diameter_mm: float = 10.0  # RANO-BM measurable lesion: longest diameter
    measurable_min_slices: int = 2    # RANO-BM: visible on at least this many axial slices
    desc: str = "lesion"              # BIDS input: which desc-<label> mask when several exist

    def __post_init__(self) -> None:
        _require(self.connectivity in (6, 18, 26),
                 f"connectivity must be 6, 18 or 26, got {self.connectivity}")
        _require(self.min_volume_mm3 >= 0, "min_volume_mm3 must be >= 0")
        _require(self.max_memory_mb > 0, "max_memory_mb must be > 0")
        _require(self.affine_tolerance_mm > 0, "affine_tolerance_mm must be > 0")


# ---- stage 2 (matching): owned by pipeline/matching/links.py's authors; edit only this class ----
@dataclass(frozen=True)
class MatchSettings:
    """Stage 2: matching components across sessions into lesion tracks.

    The link score (see ``pipeline.matching.overlap``) is
    ``weight_overlap * Dice + weight_inside * [a centroid lies inside the other component]
    + weight_distance * max(0, 1 - distance_ratio / max_distance_ratio)``.
    """

    max_gap: int = 2                  # sessions a lesion may be absent and keep its id
    weight_overlap: float = 0.5       # score weight of the Dice overlap (unitless)
    weight_inside: float = 0.25       # score weight of "a centroid lies inside the other"
    weight_distance: float = 0.25     # score weight of centroid closeness (unitless)
    max_distance_ratio: float = 1.5   # gate: centroid distance / equivalent radius for pairs
    #                                   without overlap (unitless)
    max_distance_mm: float = 30.0     # gate: centroid distance for pairs without overlap (mm)
    min_radius_mm: float = 2.0        # floor of the equivalent radius in distance ratios (mm)
    ambiguity_margin: float = 0.1     # review a link when a rival scores within this (unitless)
    review_min_overlap: float = 0.1   # review a link with Dice below this and no centroid inside
    review_max_distance_ratio: float = 1.0  # review a link whose distance ratio exceeds this
    misregistration_mm: float = 3.0   # warn when a session's lesions share a shift above this (mm)
    misregistration_min_pairs: int = 2  # matched pairs needed before a common shift is judged
    register: bool = False            # rigid registration of each session's image to the first's
    registration_iterations: int = 100  # optimizer iterations per pyramid level (4/2/1)
    registration_bins: int = 50       # histogram bins of Mattes mutual information
    registration_sampling: float = 0.2  # fraction of voxels sampled by the metric (0-1]

    def __post_init__(self) -> None:
        _require(self.max_gap >= 0, "max_gap must be >= 0")
        for name in ("weight_overlap", "weight_inside", "weight_distance"):
            _require(getattr(self, name) >= 0, f"{name} must be >= 0")
        _require(self.weight_overlap + self.weight_inside + self.weight_distance > 0,
                 "the score weights must not all be 0")
        for name in ("max_distance_ratio", "max_distance_mm", "min_radius_mm",
                     "review_max_distance_ratio", "misregistration_mm"):
            _require(getattr(self, name) > 0, f"{name} must be > 0")
        _require(0 <= self.ambiguity_margin <= 1, "ambiguity_margin must be in [0, 1]")
        _require(0 <= self.review_min_overlap <= 1, "review_min_overlap must be in [0, 1]")
        _require(self.misregistration_min_pairs >= 1, "misregistration_min_pairs must be >= 1")
        _require(self.registration_iterations >= 1, "registration_iterations must be >= 1")
        _require(self.registration_bins >= 4, "registration_bins must be >= 4")
        _require(0 < self.registration_sampling <= 1, "registration_sampling must be in (0, 1]")


# ---- stage 3 (fitting): owned by pipeline/growth/lesion_fits.py's authors; edit only this class
# ----
@dataclass(frozen=True)
class FitSettings:
    """Stage 3: growth-law fitting."""

    models: tuple[str, ...] = ("power", "exponential", "gompertz", "logistic", "surface")
    beta_bounds: tuple[float, float] = (-1.0, 3.0)  # power-law exponent beta (unit-free)
    max_rate_per_day: float = 2.0     # bound of |k|, logistic |r|, Gompertz c (1/day)
    beta_grid_step: float = 0.1       # spacing of the beta profile grid (unit-free)
    measurement_error: float = 0.0    # SD of ln-volume error (0.1 ~ 10 %); 0 = estimate it
    confidence: float = 0.95          # level of beta and forecast intervals (0-1)
    max_beta_ci_width: float = 1.0    # wider beta interval -> note 'not pinned down' (unit-free)
    from_nadir: bool = True           # after an event, fit from the phase's nadir on (regrowth)
    nadir_noise_sd: float = 0.1       # ln-volume SD of the nadir tolerance if measurement_error=0
    response_models: tuple[str, ...] = (  # laws fitted over whole post-event phases (shrinkage)
        "regression_regrowth", "bertalanffy_loss")
    fit_merged_sum: bool = False      # fit a survivor's rows after a merge (summed volume)
    detection_limit_mm3: float = 0.0  # volumes in (0, this] are left out (mm^3)
    forecast_days: float = 90.0       # horizon after the last fitted session (days, 0-1826)
    bootstrap: int = 0                # parametric-bootstrap repeats for beta (0 = off)
    seed: int = 0                     # random seed of the bootstrap

    def __post_init__(self) -> None:
        numbers = {k: v for k, v in vars(self).items() if isinstance(v, float)}
        numbers.update({f"beta_bounds[{i}]": float(v) for i, v in enumerate(self.beta_bounds)})
        bad = [k for k, v in numbers.items() if v != v or v in (float("inf"), -float("inf"))]
        _require(not bad, f"{', '.join(bad)} must be a finite number")
        _require(len(self.models) > 0, "models must name at least one law")
        known = ("power", "exponential", "gompertz", "logistic", "surface",
                 "regression_regrowth", "bertalanffy_loss")
        unknown = [m for m in self.models if m not in known]
        _require(not unknown, f"unknown growth law(s) {unknown}; choose from {list(known)}")
        repeated = sorted({m for m in self.models if self.models.count(m) > 1})
        _require(not repeated, f"models names {repeated} more than once; name each law once")
        odd = [m for m in self.response_models if m not in known]
        _require(not odd, f"unknown response law(s) {odd}; choose from {list(known)}")
        _require(self.nadir_noise_sd >= 0, "nadir_noise_sd must be >= 0")
        _require(len(self.beta_bounds) == 2 and self.beta_bounds[0] < 1.0 < self.beta_bounds[1],
                 f"beta_bounds must be (low, high) with low < 1 < high, got {self.beta_bounds}")
        _require(self.max_rate_per_day > 0, "max_rate_per_day must be > 0")
        _require(0 < self.beta_grid_step <= 0.5, "beta_grid_step must be in (0, 0.5]")
        _require(self.measurement_error >= 0, "measurement_error must be >= 0 (0 = unknown)")
        _require(0.5 <= self.confidence < 1, "confidence must be in [0.5, 1)")
        _require(self.max_beta_ci_width > 0, "max_beta_ci_width must be > 0")
        _require(self.detection_limit_mm3 >= 0, "detection_limit_mm3 must be >= 0")
        _require(0 <= self.forecast_days <= MAX_FORECAST_DAYS,
                 f"forecast_days must be between 0 and {MAX_FORECAST_DAYS:g} days (5 years: a "
                 f"law fitted to months of follow-up says nothing further), got "
                 f"{self.forecast_days:g}")
        _require(self.bootstrap >= 0, "bootstrap must be >= 0 (0 = off)")


# ---- response: owned by pipeline/growth/response.py's authors; edit only this class ----
@dataclass(frozen=True)
class ResponseSettings:
    """Target-lesion radiographic response (response.tsv); research use only."""

    write: bool = True                # fit and run write response.tsv and response_subjects.tsv
    max_targets: int = 5              # target lesions chosen at baseline (RANO-BM: up to 5)
    absolute_rule: str = "lesion"     # PD also needs 'lesion' (one target, RANO-BM) or 'sum'
    #                                   (RECIST 1.1) grown by absolute_mm
    absolute_mm: float = 5.0          # absolute growth of progression (mm)

    def __post_init__(self) -> None:
        _require(self.max_targets >= 1, "max_targets must be >= 1")
        _require(self.absolute_rule in ("lesion", "sum"),
                 f"absolute_rule must be 'lesion' or 'sum', got {self.absolute_rule!r}")
        _require(self.absolute_mm >= 0, "absolute_mm must be >= 0")


# ---- population model: owned by pipeline/growth/population.py's authors; edit only this class ----
@dataclass(frozen=True)
class PopulationSettings:
    """Population (mixed-effects) growth model over each group and phase."""

    enabled: bool = True              # write population_fits.tsv and its companions
    models: tuple[str, ...] = ("power", "exponential", "gompertz", "logistic", "surface")
    covariance: str = "diagonal"      # between-lesion covariance: 'diagonal' or 'full'
    backtest: bool = True             # refit without each lesion's last session (backtest.tsv)

    def __post_init__(self) -> None:
        known = ("power", "exponential", "gompertz", "logistic", "surface")
        unknown = [m for m in self.models if m not in known]
        _require(len(self.models) > 0 and not unknown,
                 f"population models must name known laws {list(known)}, got {self.models}")
        _require(self.covariance in ("full", "diagonal"),
                 f"covariance must be 'full' or 'diagonal', got {self.covariance!r}")


# ---- evaluate: owned by pipeline/growth/evaluate.py's authors; edit only this class ----
@dataclass(frozen=True)
class EvaluateSettings:
    """Marker evaluation (evaluation.tsv): the subject bootstrap of the ROC AUC interval."""

    bootstrap: int = 2000             # subject-bootstrap resamples of the AUC interval
    seed: int = 0                     # random seed of the bootstrap
    confidence: float = 0.95          # level of the AUC interval (0-1)

    def __post_init__(self) -> None:
        _require(self.bootstrap >= 100, "bootstrap must be >= 100 (resamples of the interval)")
        _require(0.5 <= self.confidence < 1, "confidence must be in [0.5, 1)")


# ---- report: owned by pipeline/report/build.py's authors; edit only this class ----
@dataclass(frozen=True)
class ReportSettings:
    """The QA report."""

    max_lesion_panels: int = 0        # lesions shown with slices, flagged first (0 = every lesion)
    slice_window_mm: float = 40.0     # mm; smallest side of the square shown around a lesion
    figure_dpi: int = 80              # dots per inch of the slice panels (about 1.9 inch each)
    panels_per_row: int = 6           # sessions per row in a lesion's slice figure

    def __post_init__(self) -> None:
        _require(self.max_lesion_panels >= 0, "max_lesion_panels must be >= 0")
        _require(self.slice_window_mm > 0, "slice_window_mm must be > 0")
        _require(20 <= self.figure_dpi <= 300, "figure_dpi must be between 20 and 300")
        _require(self.panels_per_row >= 1, "panels_per_row must be >= 1")
