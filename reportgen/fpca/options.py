"""Settings of a fit (no numerical imports: the spec layer builds them without loading the
compiled core)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class FPCAOptions:
    """Settings of a fit; the names are the spec's ``model`` section (see the README).

    A bandwidth is a number (used as given) or ``"auto"`` (chosen by ``bandwidth_method``:
    ``"cv"``, K-fold cross-validation over subjects, or ``"gcv"``). ``diagonal_bandwidth``
    smooths the squared residuals of single readings (the variance of a reading), on its
    own as in Yao, Müller & Wang (2005). ``criteria_max_subjects`` caps the seeded sample of
    subjects over which AIC, BIC and cv are computed (the likelihood refinement itself uses
    up to ``REFINE_MAX_SUBJECTS``).
    ``component_rule`` is one of ``"fve"`` (smallest K reaching ``fve_threshold``),
    ``"aic"``, ``"bic"``, ``"cv"`` (leave-one-reading-out prediction error) or ``"fixed"``
    (``n_components``). ``band`` is ``"plugin"`` (the population quantities taken as
    known), ``"corrected"`` (``bootstrap_replicates`` refits on subjects resampled with
    replacement add the uncertainty of the population quantities; ``predictor.corrected_bands``)
    or ``"auto"`` (corrected up to ``fit.AUTO_CORRECTED_MAX_SUBJECTS`` subjects, plug-in
    above, where the population quantities' estimation error is small and the refits cost
    most). ``eigenfunctions`` is ``"auto"`` (refined by the marginal likelihood over a
    spline basis when that improves the cross-validated likelihood; ``fpca.refine``),
    ``"smoothing"`` (those of the covariance surface) or ``"likelihood"`` (refined, without
    the comparison).
    """

    n_grid: int = 101
    domain: tuple[float, float] | None = None
    kernel: str = "epanechnikov"
    mean_bandwidth: float | str = "auto"
    covariance_bandwidth: float | str = "auto"
    diagonal_bandwidth: float | str = "auto"
    bandwidth_method: str = "cv"
    cv_folds: int = 5
    mean_bins: int = 401
    covariance_bins: int = 101
    component_rule: str = "fve"
    fve_threshold: float = 0.95
    n_components: int | None = None
    max_components: int = 8
    criteria_max_subjects: int = 5000
    band_level: float = 0.95
    band: str = "auto"
    eigenfunctions: str = "auto"
    bootstrap_replicates: int = 50
    seed: int = 0

    def fitted_domain(self, t_min: float, t_max: float) -> tuple[float, float]:
        """The domain a fit works on: the declared one, or the readings' range."""
        return self.domain if self.domain is not None else (t_min, t_max)

    def as_dict(self) -> dict[str, Any]:
        out = {name: getattr(self, name) for name in self.__dataclass_fields__}
        if self.domain is not None:
            out["domain"] = list(self.domain)
        return out
