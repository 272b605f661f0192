"""The battery of checks on one model's pass-2 aggregates.

``run_checks(pass_two, model) -> tuple[CheckResult, ...]`` runs every check that
the window supports, in the order of :data:`CHECKS`; a check the data cannot
support returns a "not applicable" result with the reason.  With a baseline in
the pass-2 result the drift checks (:mod:`monitor.stats.drift`) follow.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from ._collinearity import condition_index, variance_inflation
from ._form import reset
from ._independence import breusch_godfrey, durbin_watson, ljung_box
from ._influence import cooks_distance, outlier_bonferroni
from ._normality import anderson_darling, dagostino_pearson, jarque_bera, shapiro_wilk
from ._result import CHECKS, CheckResult, CheckSpec
from ._stability import chow_test, cusum
from ._variance import breusch_pagan, white

if TYPE_CHECKING:
    from ..residual_pass import PassTwoResult

__all__ = ["CHECKS", "CheckResult", "CheckSpec", "run_checks"]


def run_checks(result: PassTwoResult, model: int) -> tuple[CheckResult, ...]:
    """Every check of model ``model`` (index into the family's formulas)."""
    checks = [
        jarque_bera(result, model),
        dagostino_pearson(result, model),
        shapiro_wilk(result, model),
        anderson_darling(result, model),
        breusch_pagan(result, model, studentized=False),
        breusch_pagan(result, model, studentized=True),
        white(result, model),
        durbin_watson(result, model),
        breusch_godfrey(result, model),
        ljung_box(result, model),
        reset(result, model),
        variance_inflation(result, model),
        condition_index(result, model),
        outlier_bonferroni(result, model),
        cooks_distance(result, model),
        cusum(result, model),
    ]
    chow = chow_test(result, model)
    if result.baseline is not None:
        from ..drift import drift_checks

        drift = drift_checks(result, model)
        if chow is None:
            chow = next((c for c in drift if c.check == "chow"), None)
        checks.extend(c for c in drift if c.check != "chow")
    if chow is not None:
        checks.insert(16, chow)
    return tuple(checks)

