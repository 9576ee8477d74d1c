r"""Calibration of predicted choice probabilities: bands with a stated false-alarm rate, and their grade.

A reliability table (:func:`hierchoice.diagnostics.predictive.reliability`) bins every (task, available
alternative) by its predicted probability and sets the bin's mean prediction :math:`\bar p_b` against the share
chosen :math:`\bar y_b`. If the predictions are right and the outcomes independent given them,

.. math::

    \mathrm{E}\,\bar y_b = \bar p_b, \qquad
    \mathrm{SE}_b = \frac{1}{n_b}\sqrt{\textstyle\sum_{i \in b} p_i (1 - p_i)},

and :math:`z_b = (\bar y_b - \bar p_b) / \mathrm{SE}_b` is about standard normal (a sum of independent
Bernoulli outcomes; the normal approximation is used only for bins with at least 5 expected choices and 5
expected non-choices). A bin is flagged when :math:`|z_b|` exceeds :math:`z^\ast = \Phi^{-1}(1 - \alpha / 2m)`
over the :math:`m` graded bins (Bonferroni): with :math:`\alpha = 0.01` a well-calibrated model raises a false
alarm in at most 1 % of reliability tables (10 bins: :math:`z^\ast = 3.29`). Alternatives of one task are
negatively dependent (exactly one is chosen); within a bin this only lowers the variance, so the bands err wide.

**Which predictions may be graded.** Only predictions of choices the fit did not see: held-out tasks
(:func:`hierchoice.diagnostics.predictive.holdout_split`) predicted from each person's posterior tastes fitted
without them. In-sample, each person's posterior has already seen the very choice being predicted, so the
predicted probability is pulled towards the observed outcome; binned by that prediction, the observed shares
come out *more extreme* than predicted (the curve is steeper than the diagonal) even when the model is exactly
right. :func:`calibration_check` therefore refuses to grade in-sample tables.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from .._records import Check
from ..exceptions import SpecError

__all__ = ["CALIBRATION_ALPHA", "MIN_EXPECTED", "band_z", "calibration_bands", "calibration_check"]

#: Family-wise false-alarm rate of the calibration bands over all graded bins of one table.
CALIBRATION_ALPHA = 0.01
#: A bin is graded only with at least this many expected choices and expected non-choices (normal approximation
#: to the binomial; common practice).
MIN_EXPECTED = 5.0

_REF = ("binomial standard error with a Bonferroni bound over the bins (family-wise false-alarm rate "
        f"{CALIBRATION_ALPHA:.0%}); normal approximation with >= {MIN_EXPECTED:g} expected counts: common practice")


def band_z(n_bins: int, alpha: float = CALIBRATION_ALPHA) -> float:
    """Half-width of the bands in standard errors: :math:`\\Phi^{-1}(1 - \\alpha / 2m)` for ``m`` graded bins."""
    from scipy.stats import norm

    return float(norm.ppf(1 - alpha / (2 * max(1, n_bins))))


def calibration_bands(table: pd.DataFrame, *, alpha: float = CALIBRATION_ALPHA) -> pd.DataFrame:
    """A reliability table with its bands: ``expected_chosen``, ``graded``, ``z``, ``band_low``, ``band_high``,
    ``outside``.

    ``band_low`` / ``band_high`` are :math:`\\bar p_b \\mp z^\\ast \\mathrm{SE}_b` (clipped to [0, 1]), with
    :math:`z^\\ast` from :func:`band_z` over the graded bins; ``outside`` is set only on graded bins. The band
    half-width in SEs is in ``attrs["z_band"]``, the false-alarm rate in ``attrs["alpha"]``.
    """
    out = table.copy()
    n, p = out["n"].astype(float), out["mean_predicted"].astype(float)
    out["expected_chosen"] = n * p
    out["graded"] = (n * p >= MIN_EXPECTED) & (n * (1 - p) >= MIN_EXPECTED) & (out["se"] > 0)
    z_band = band_z(int(out["graded"].sum()), alpha)
    with np.errstate(divide="ignore", invalid="ignore"):
        out["z"] = (out["observed"] - p) / out["se"]
    out["band_low"] = (p - z_band * out["se"]).clip(lower=0.0)
    out["band_high"] = (p + z_band * out["se"]).clip(upper=1.0)
    out["outside"] = out["graded"] & (out["z"].abs() > z_band)
    out.attrs.update(table.attrs)
    out.attrs.update(z_band=z_band, alpha=alpha)
    return out


def calibration_check(table: pd.DataFrame, *, in_sample: bool = False, subject: str = "held-out tasks",
                      alpha: float = CALIBRATION_ALPHA) -> Check:
    """Grade a reliability table: pass when every graded bin lies within its band, warn otherwise.

    Parameters
    ----------
    table : DataFrame
        :func:`~hierchoice.diagnostics.predictive.reliability` of predictions the fit did not see.
    in_sample : bool, default False
        True for the fit's own tasks: such a table is not graded (see the module notes) and a
        :class:`~hierchoice.exceptions.SpecError` says so.
    subject : str
        What was predicted, for the record.
    alpha : float, default 0.01
        Family-wise false-alarm rate over the graded bins.

    Returns
    -------
    Check
        ``calibration``; value: the largest :math:`|z_b|`; threshold: :math:`z^\\ast`; detail: the bins outside.
    """
    if in_sample:
        raise SpecError("In-sample calibration is not graded: each person's tastes were fitted to the choices "
                         "being predicted, so a correct model looks miscalibrated (observed shares more extreme "
                         "than predicted). Grade held-out tasks (hierchoice holdout).")
    bands = calibration_bands(table, alpha=alpha)
    graded = bands[bands["graded"]]
    z_band = float(bands.attrs["z_band"])
    rule = (f"every bin within ±{z_band:.2f} SE ({len(graded)} graded bins; false-alarm rate {alpha:.0%} "
            "for a calibrated model)")
    if graded.empty:
        return Check("calibration", subject, math.nan, z_band, rule, "warn",
                     "No bin has enough predictions to grade (at least 5 expected choices and non-choices): hold "
                     "out more tasks per person.", _REF)
    worst = float(graded["z"].abs().max())
    out = graded[graded["outside"]]
    detail = "; ".join(f"bin {r.bin_lower:.1f}-{r.bin_upper:.1f}: predicted {r.mean_predicted:.3f}, observed "
                       f"{r.observed:.3f} (z = {r.z:+.1f}, n = {int(r.n)})" for r in out.itertuples())
    if out.empty:
        return Check("calibration", subject, worst, z_band, rule, "pass", "", _REF,
                     f"largest |z| {worst:.2f} of {len(graded)} graded bins")
    steeper = bool(((out["observed"] - out["mean_predicted"]) * (out["mean_predicted"] - 0.5) > 0).all())
    shape = ("the observed shares are more extreme than predicted: predictions too cautious (tastes or their "
             "spread across people too small, e.g. a taste fixed that varies)" if steeper else
             "predictions too extreme or shifted: check the constants, attribute coding and the taste "
             "distributions")
    advice = (f"{len(out)} of {len(graded)} bins lie outside their band: {shape}. A calibrated model puts a bin "
              f"outside in {alpha:.0%} of tables, so this is unlikely to be chance.")
    return Check("calibration", subject, worst, z_band, rule, "warn", advice, _REF, detail)
