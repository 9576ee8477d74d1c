"""Simulation-based calibration of the model families beyond one normal taste (slow step).

Each test runs the project's calibration (``hierchoice.validation.simulation_based_calibration``; Talts, Betancourt,
Simpson, Vehtari & Gelman 2018, arXiv:1804.06788, with thinning) on an invented design (simulation with known
truth: every fit draws its truth from the model's prior) and asserts the project's uniformity verdict
(``flagged``: the exact simultaneous ECDF band of Säilynoja, Bürkner & Vehtari 2022, Statistics and Computing 32:32,
or the binned chi-square, rejects) for every population parameter:

* a lognormal (negative sign) price taste beside a normal taste, with the blocked sampler;
* two correlated normal tastes (the correlation is a parameter), with the blocked sampler;
* willingness-to-pay space (Train & Weeks 2005), which the blocked sampler refuses (docs/blocked.md), with
  PyMC's NUTS at a small size.

**Size.** ``FITS`` = 40 fits per family, ranks among ``THIN_TO`` = 20 thinned draws. On the 2 shared cores (2
workers) a blocked fit of the 80-person design takes about 8-10 s and a NUTS fit of the 30-person WTP-space design
about 8-10 s (measured here), so the three families take about 3 x 40 x 9 s / 2 workers, 9 minutes, inside the 12
minutes this file may take.

**What 40 fits can see** (computed with the project's own exact band, ``ecdf_band(40, 20, prob=1 - ALPHA)``, in
``test_the_band_is_as_wide_as_stated`` below): the ECDF of the ranks must leave the simultaneous band, whose
half-width is about 0.29 at mid-range, before the band test flags a parameter. A posterior biased by delta
posterior SDs moves the rank ECDF by up to 2 Phi(delta / 2) - 1 (at the median), so a bias of about 0.75
posterior SD is detected about half the time and larger ones more often; a posterior whose SD is off by a factor of
about 2 (ranks piled at the ends or in the middle) likewise. Smaller faults need more fits (docs/calibration.md).

**False alarms.** Each parameter is flagged when either test rejects at ``ALPHA``, so a correctly calibrated
parameter is flagged with probability at most 2 ALPHA (docs/calibration.md, measured 1.6-2.1 % at alpha = 0.01).
With at most 5 parameters per family and ``ALPHA`` = 0.001 (Bonferroni over the parameters and the two tests), each
test below fails a correct sampler with probability at most 2 x 0.001 x 5 = 1 %.
"""

from __future__ import annotations

import distributed  # the "distributed" extra: dask[distributed]
import numpy as np
import pytest
from scipy import stats

import hierchoice as hc
from hierchoice import validation as cal
from hierchoice.validation.distributed import local_cluster
from hierchoice.validation.sbc import ecdf_band

FITS = 40
THIN_TO = 20
ALPHA = 0.001
#: The blocked sampler at a size whose thinned draws are near independent (median bulk ESS of taste_sd measured
#: 70-300 of 1,000 draws on these designs, above THIN_TO).
BLOCKED = cal.NutsFitter(draws=500, tune=300, chains=2, method="blocked")
#: PyMC's NUTS on one chain: the quickest for many fits of one design (docs/calibration.md).
NUTS = cal.NutsFitter(draws=150, tune=150, chains=1, backend="pymc")
LEVELS = [-1.0, 0.0, 1.0]


@pytest.fixture(scope="module")
def client():
    with local_cluster(2) as cluster, distributed.Client(cluster, set_as_default=False) as c:
        yield c


def _panel(attributes: list[hc.SimAttribute], n_persons: int, n_tasks: int, *, model: dict | None = None,
           **kwargs) -> hc.ChoicePanel:
    sim = hc.simulate_panel(attributes, n_persons=n_persons, n_tasks=n_tasks, alternatives=("a", "b", "c"), seed=1,
                            **kwargs)
    if model:
        sim.spec["model"] = sim.spec.get("model", {}) | model
    return hc.ChoicePanel.from_frame(sim.data, sim.spec)


def _price_and_x() -> list[hc.SimAttribute]:
    # the truths of the calibration come from the prior; these values only make the design
    return [hc.SimAttribute("price", levels=[1.0, 2.0, 3.0, 4.0], taste="lognormal", mean=0.0, sd=0.5,
                            sign="negative"),
            hc.SimAttribute("x", levels=LEVELS, taste="normal", mean=0.5, sd=0.5)]


def _assert_calibrated(res, expected: set[str]) -> None:
    assert set(res["parameter"].values.tolist()) == expected
    assert int(res["failed"].sum()) == 0, res["error"].values
    # the verdict: no parameter flagged (false-alarm rate of this assert <= 1 %: module docstring)
    assert not res["flagged"].any(), cal.format_calibration(res)


def test_the_band_is_as_wide_as_stated() -> None:
    """The detectable size quoted in the module docstring, from the exact band (docs/calibration.md)."""
    z, low, high = ecdf_band(FITS, THIN_TO, prob=1 - ALPHA)
    mid = np.argmin(np.abs(z - 0.5))
    half_width = (high[mid] - low[mid]) / 2
    assert 0.22 < half_width < 0.35, half_width
    # a bias of 0.75 posterior SDs moves the rank ECDF at the median by 2 Phi(0.375) - 1 (normal posterior)
    shift = 2 * stats.norm.cdf(0.75 / 2) - 1
    assert shift == pytest.approx(half_width, abs=0.05)


@pytest.mark.slow
def test_lognormal_taste_is_calibrated_with_the_blocked_sampler(client) -> None:
    panel = _panel(_price_and_x(), 80, 8)
    res = cal.simulation_based_calibration(panel, fits=FITS, thin_to=THIN_TO, fitter=BLOCKED, seed=2026,
                                           alpha=ALPHA, client=client, progress=False)
    print(cal.format_calibration(res), "\nseconds per fit:", float(res["seconds"].median()))
    _assert_calibrated(res, {"taste_mean[price]", "taste_mean[x]", "taste_sd[price]", "taste_sd[x]"})


@pytest.mark.slow
def test_correlated_tastes_are_calibrated_with_the_blocked_sampler(client) -> None:
    attrs = [hc.SimAttribute("x1", levels=LEVELS, taste="normal", mean=0.5, sd=0.5),
             hc.SimAttribute("x2", levels=LEVELS, taste="normal", mean=-0.5, sd=0.5)]
    panel = _panel(attrs, 80, 8, correlation=0.3)
    assert panel.spec.model.correlated
    res = cal.simulation_based_calibration(panel, fits=FITS, thin_to=THIN_TO, fitter=BLOCKED, seed=2027,
                                           alpha=ALPHA, client=client, progress=False)
    print(cal.format_calibration(res), "\nseconds per fit:", float(res["seconds"].median()))
    _assert_calibrated(res, {"taste_mean[x1]", "taste_mean[x2]", "taste_sd[x1]", "taste_sd[x2]",
                             "taste_corr[x1,x2]"})


@pytest.mark.slow
def test_wtp_space_is_calibrated_with_nuts(client) -> None:
    panel = _panel(_price_and_x(), 30, 6, model={"wtp_space": True, "price": "price"})
    res = cal.simulation_based_calibration(panel, fits=FITS, thin_to=THIN_TO, fitter=NUTS, seed=2028,
                                           alpha=ALPHA, client=client, progress=False)
    print(cal.format_calibration(res), "\nseconds per fit:", float(res["seconds"].median()))
    _assert_calibrated(res, {"taste_mean[price]", "taste_mean[x]", "taste_sd[price]", "taste_sd[x]"})
