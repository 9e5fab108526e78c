"""Row bookkeeping shared by the detectors: outlier rows."""
import numpy as np

from edges._types import REASON_CODES
from edges._windows import flag_outlier_rows


def _chi2(rng, n_rows=600, dof=20):
    # reduced chi-square of rows whose noise model is right: chi2(dof) / dof
    return rng.chisquare(dof, (3, n_rows)) / dof


def test_a_run_of_high_residuals_is_flagged_and_widened(rng):
    chi2 = _chi2(rng)
    chi2[1, 300:320] *= 12.0                    # a particle: 20 rows far outside the noise model
    code = flag_outlier_rows(chi2, np.zeros(chi2.shape, int), np.full(chi2.shape, 20))
    flagged = np.flatnonzero(code[1] == REASON_CODES["outlier"])
    # the run (less the running median's 2-row edges) widened by half its length on each side
    assert flagged.min() <= 295 and flagged.max() >= 324 and flagged.size <= 45
    assert not code[[0, 2]].any()               # the other edges untouched


def test_noise_spikes_and_smooth_misfit_are_not_outliers(rng):
    chi2 = _chi2(rng, dof=2)                    # few degrees of freedom: a long exponential tail
    chi2[0, ::97] = 25.0                        # isolated wild rows
    chi2[2] *= 1 + np.sin(np.linspace(0, 20, chi2.shape[1])) ** 2    # misfit that follows the edge, up to 2x
    code = flag_outlier_rows(chi2, np.zeros(chi2.shape, int), np.full(chi2.shape, 2))
    assert not code.any()
    high = _chi2(rng)
    high[0] *= 10                               # high everywhere: a model the data do not follow, not a defect
    high[0, :450] /= 10
    assert not flag_outlier_rows(high, np.zeros(high.shape, int), np.full(high.shape, 20))[0].any()
