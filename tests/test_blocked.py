"""The blocked sampler (hierchoice.blocked): gradients, densities, the conjugate update, seeds, refusals, fit()."""

from __future__ import annotations

import copy
import functools
from dataclasses import replace

import numpy as np
import pytest

import hierchoice as hc
from hierchoice.exceptions import SpecError
from hierchoice.inference import blocked as bl
from hierchoice.inference.blocked.kernels import person_loglik, person_loglik_grad
from hierchoice.inference.blocked.problem import PopulationState
from hierchoice.inference.blocked.shard import LocalShards
from hierchoice.inference.blocked.updates import (
    _asis_terms,
    _entries,
    _location_conjugate,
    _location_terms,
    _update_covariance,
    _update_persons,
)
from hierchoice.spec import load_spec


def _centred(spec):  # type: ignore[no-untyped-def]
    spec = load_spec(spec)
    return replace(spec, model=replace(spec.model, parameterization="centred"))


@pytest.fixture(scope="module")
def ferry():  # type: ignore[no-untyped-def]
    """Lognormal + normal correlated tastes, fixed dummies, constants with centring (the demo's shape, small)."""
    sim = hc.ferry_scenario(40, n_tasks=6, seed=4)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    return sim, panel, _centred(sim.spec)


@pytest.fixture(scope="module")
def covariate_panel():  # type: ignore[no-untyped-def]
    """Independent normal tastes whose means a person covariate shifts (no constants, no fixed tastes)."""
    attrs = [hc.SimAttribute("x1", levels=[-1.0, 0.0, 1.0], taste="normal", mean=0.8, sd=0.5),
             hc.SimAttribute("x2", levels=[-1.0, 0.0, 1.0], taste="normal", mean=-0.5, sd=0.4)]
    sim = hc.simulate_panel(attrs, n_persons=30, n_tasks=5, alternatives=("a", "b", "c"),
                            covariates={"age": {"x1": 0.3}}, seed=3)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    return sim, panel, _centred(sim.spec)


def _local(prob, st, shards=1):  # type: ignore[no-untyped-def]
    """The population half of ``st`` and in-process shards holding its persons (state set by hand)."""
    loc = LocalShards(prob, (1, 2), shards)
    for sh in loc.shards:
        a, b = sh.start, sh.stop
        sh.state = bl.BlockedState(mu_free=st.mu_free, gamma=st.gamma, L=st.L, eta=st.eta[a:b].copy(), h=st.h[a:b].copy())
    return PopulationState(mu_free=st.mu_free.copy(), gamma=st.gamma.copy(), L=st.L.copy()), loc


def _random_state(prob, rng):  # type: ignore[no-untyped-def]
    """A random point of the centred model's free variables (internal scale)."""
    r = prob.n_random
    L = np.tril(rng.normal(0, 0.3, (r, r)), -1) + np.diag(rng.uniform(0.2, 1.0, r))
    if not prob.layout.correlated:
        L = np.diag(np.diag(L))
    return bl.BlockedState(mu_free=rng.normal(0, 0.5, prob.n_attributes),
                           gamma=rng.normal(0, 0.5, (prob.n_covariates, prob.shifted.size)), L=L,
                           eta=rng.normal(0, 0.7, (prob.n_persons, r)), h=np.ones(prob.n_persons))


# ----------------------------------------------------------------------------- gradients


def test_person_gradient_matches_central_finite_differences(ferry) -> None:  # type: ignore[no-untyped-def]
    """Per-person likelihood gradient against second-order central finite differences (step 1e-6)."""
    _, panel, spec = ferry
    prob = bl.blocked_problem(panel, spec)
    rng = np.random.default_rng(0)
    beta = rng.normal(0, 0.8, (prob.n_persons, prob.n_attributes))
    ll, grad = person_loglik_grad(prob.data, beta)
    eps = 1e-6
    fd = np.empty_like(grad)
    for k in range(prob.n_attributes):
        up, down = beta.copy(), beta.copy()
        up[:, k] += eps
        down[:, k] -= eps
        fd[:, k] = (person_loglik(prob.data, up) - person_loglik(prob.data, down)) / (2 * eps)
    np.testing.assert_allclose(grad, fd, atol=1e-6, rtol=1e-6)
    # and the per-person values sum to the panel kernel NUTS uses (an independent layout and code path)
    from hierchoice.model.likelihood import difference_data, task_loglik_numpy

    data = difference_data(panel.X, panel.available, panel.task_mask, panel.chosen, scale=prob.layout.scale)
    np.testing.assert_allclose(ll, task_loglik_numpy(data, beta).sum(axis=1), rtol=1e-12, atol=1e-10)


def test_person_target_gradient_chain_rule_matches_finite_differences(ferry) -> None:  # type: ignore[no-untyped-def]
    """The MALA target's gradient w.r.t. eta (prior + likelihood through s*exp(eta) for the lognormal fare), central FD."""
    from hierchoice.inference.blocked.kernels import _log_target

    _, panel, spec = ferry
    prob = bl.blocked_problem(panel, spec)
    rng = np.random.default_rng(1)
    state = _random_state(prob, rng)
    beta_fixed = bl.locations(prob, state.mu_free, state.gamma)
    m = beta_fixed[:, prob.rnd]
    r = prob.n_random
    scratch = [np.empty(prob.n_attributes), np.empty(prob.data.max_others), np.empty(r), np.empty(r)]

    def target(n, eta_n):  # type: ignore[no-untyped-def]
        beta = beta_fixed[n].copy()
        g, delta, y, grad = (a.copy() for a in scratch)
        d = prob.data
        lp, _ = _log_target(d.D, d.task_ptr, d.person_ptr[n], d.person_ptr[n + 1], beta, eta_n, m[n], state.L, prob.rnd,
                            prob.logn, prob.sign, g, delta, y, grad)
        return lp, grad

    eps = 1e-6
    for n in range(5):
        eta_n = state.eta[n].copy()
        _, grad = target(n, eta_n)
        for a in range(r):
            up, down = eta_n.copy(), eta_n.copy()
            up[a] += eps
            down[a] -= eps
            fd = (target(n, up)[0] - target(n, down)[0]) / (2 * eps)
            assert grad[a] == pytest.approx(fd, rel=1e-5, abs=1e-6)


def test_person_information_matches_finite_difference_hessian(ferry) -> None:  # type: ignore[no-untyped-def]
    """The logit information (the MALA preconditioner) is minus the Hessian: central differences of the gradient."""
    from hierchoice.inference.blocked.kernels import person_information

    _, panel, spec = ferry
    prob = bl.blocked_problem(panel, spec)
    beta = np.random.default_rng(4).normal(0, 0.8, (prob.n_persons, prob.n_attributes))
    F = person_information(prob.data, beta)
    eps = 1e-5
    for k in range(prob.n_attributes):
        up, down = beta.copy(), beta.copy()
        up[:, k] += eps
        down[:, k] -= eps
        hk = (person_loglik_grad(prob.data, up)[1] - person_loglik_grad(prob.data, down)[1]) / (2 * eps)
        np.testing.assert_allclose(F[:, :, k], -hk, atol=1e-6)


def test_mala_pass_samples_one_persons_conditional() -> None:
    r"""Many independent MALA chains on one person's conditional reach its mean and SDs.

    The person's rows are repeated for 3000 "persons" (independent chains: the kernel treats persons
    separately), each run 150 steps from the population mean with an information preconditioner.
    Reference: self-normalised importance sampling from the normal prior :math:`N(m, \Sigma)` with
    400,000 draws (Geweke 1989), computed here in numpy. Per coordinate |z| < 3.5 with the standard error
    of 3000 draws (two-sided 5e-4 each; 3 coordinates: false alarm <= 0.2 %; the reference's own
    Monte Carlo error, about 1/10 of that, is added). Negative control: the same chains with the
    Metropolis correction switched off (every proposal accepted, plain Langevin steps) are checked to
    miss the SDs, so the test can fail.
    """
    from hierchoice.inference.blocked.kernels import _MALA, person_information

    sim = hc.benchmark_scenario(5, 10, 3, 3, correlated=True, seed=9)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    prob = bl.blocked_problem(panel, _centred(sim.spec))
    n = 3000
    rep = prob.data.persons(np.zeros(n, dtype=np.int64))  # person 0's cells, n times
    Dr, tptr, pptr, n_o = rep.D, rep.task_ptr, rep.person_ptr, rep.max_others
    r = prob.n_random
    L = np.array([[0.8, 0, 0], [0.3, 0.6, 0], [-0.2, 0.1, 0.7]])
    m = np.tile([0.5, -0.4, 0.2], (n, 1))
    rng = np.random.default_rng(12)
    F = person_information(prob.data.persons(slice(0, 1)), m[:1])[0]
    Q = np.linalg.inv(L @ L.T)
    R = np.ascontiguousarray(np.broadcast_to(np.linalg.cholesky(Q + F), (n, r, r)))
    beta_fixed = m.copy()

    def run(steps, accept_all):  # type: ignore[no-untyped-def]
        eta = m.copy()
        acc, ll, g = np.empty(n), np.empty(n), np.empty((n, r))
        xi = rng.standard_normal((steps, n, r))
        log_u = np.full((steps, n), -np.inf) if accept_all else np.log(rng.random((steps, n)))
        # one step per call, carrying the likelihood cache from call to call as the sampler does
        for s in range(steps):
            _MALA[1](Dr, tptr, pptr, n_o, beta_fixed, eta, m, L, R, prob.rnd, prob.logn, prob.sign,
                     np.full(n, 1.6 if accept_all else 1.0), xi[s:s + 1], log_u[s:s + 1], s > 0, ll.copy(), g.copy(),
                     acc, ll, g)
        return eta

    eta = run(150, False)
    draws = m[0] + rng.standard_normal((400_000, r)) @ L.T
    full = prob.data.persons(np.zeros(20_000, dtype=np.int64))
    logw = np.concatenate([person_loglik(full, draws[i:i + 20_000])
                           for i in range(0, draws.shape[0], 20_000)])
    w = np.exp(logw - logw.max())
    w /= w.sum()
    ref_mean = w @ draws
    ref_sd = np.sqrt(w @ (draws - ref_mean) ** 2)
    ess_is = 1 / np.sum(w**2)
    se = ref_sd * np.sqrt(1 / n + 1 / ess_is)
    assert np.all(np.abs(eta.mean(0) - ref_mean) < 3.5 * se), (eta.mean(0), ref_mean, se)
    # SDs: the SE of a sample SD is about sd / sqrt(2 n)
    se_sd = ref_sd * np.sqrt(1 / (2 * n) + 1 / (2 * ess_is))
    assert np.all(np.abs(eta.std(0) - ref_sd) < 3.5 * se_sd), (eta.std(0), ref_sd)
    wrong = run(150, True)
    assert np.any(np.abs(wrong.std(0) - ref_sd) > 3.5 * se_sd)


@pytest.mark.parametrize("which", ["ferry", "covariate_panel"])
def test_interweaving_gradient_matches_finite_differences(which, request) -> None:  # type: ignore[no-untyped-def]
    """Gradient of the non-centred conditional of (L, means) against central differences of its log density."""
    _, panel, spec = request.getfixturevalue(which)
    prob = bl.blocked_problem(panel, spec)
    rng = np.random.default_rng(8)
    st = _random_state(prob, rng)
    rows, cols = _entries(prob)
    e = rng.normal(0, 1, st.eta.shape)
    x = np.concatenate([st.L[rows, cols], st.mu_free])
    pop, shards = _local(prob, st)
    shards.call("asis_begin", pop.mu_free, pop.gamma, pop.L)
    shards.shards[0].e = e
    lp, grad, G = _asis_terms(prob, pop, shards, x)
    assert _asis_terms(prob, pop, shards, x, metric=False)[0] == pytest.approx(lp, abs=1e-9)
    eps = 1e-6
    fd = np.array([(_asis_terms(prob, pop, shards, x + eps * np.eye(x.size)[i])[0]
                    - _asis_terms(prob, pop, shards, x - eps * np.eye(x.size)[i])[0]) / (2 * eps)
                   for i in range(x.size)])
    np.testing.assert_allclose(grad, fd, rtol=1e-5, atol=1e-5)
    assert np.all(np.linalg.eigvalsh(G) > 0)


@pytest.mark.parametrize("which", ["ferry", "covariate_panel"])
def test_location_gradient_matches_finite_differences(which, request) -> None:  # type: ignore[no-untyped-def]
    """Gradient of the means' full conditional (fixed tastes' likelihood, constant centring through exp) by central FD."""
    _, panel, spec = request.getfixturevalue(which)
    prob = bl.blocked_problem(panel, spec)
    st = _random_state(prob, np.random.default_rng(13))
    x = np.concatenate([st.mu_free, st.gamma.reshape(-1)])
    pop, shards = _local(prob, st)
    _, grad = _location_terms(prob, pop, shards, x)
    eps = 1e-6
    fd = np.array([(_location_terms(prob, pop, shards, x + eps * np.eye(x.size)[i])[0]
                    - _location_terms(prob, pop, shards, x - eps * np.eye(x.size)[i])[0]) / (2 * eps)
                   for i in range(x.size)])
    np.testing.assert_allclose(grad, fd, rtol=1e-5, atol=1e-5)


# ----------------------------------------------------------------------------- densities


def _pymc_logp_differences(panel, spec, n_points: int = 4) -> np.ndarray:  # type: ignore[no-untyped-def]
    """log_density minus the PyMC centred model's logp (jacobian=False, with the panel_loglik potential)."""
    prob = bl.blocked_problem(panel, spec)
    model = hc.build_model(panel, spec)
    logp = model.compile_logp(jacobian=False)
    rng = np.random.default_rng(7)
    diffs = []
    for _ in range(n_points):
        st = _random_state(prob, rng)
        point = {"mu_std": st.mu_free, "eta_std": st.eta}
        if prob.shifted.size:
            point["gamma_std"] = st.gamma
        if prob.layout.correlated:
            rows, cols = np.tril_indices(prob.n_random)
            packed = st.L[rows, cols].copy()
            packed[rows == cols] = np.log(packed[rows == cols])  # PyMC's CholeskyCovPacked transform: log diagonal
            point["chol_std_cholesky-cov-packed__"] = packed
        else:
            point["sd_std_log__"] = np.log(np.diag(st.L))
        assert set(point) == {v.name for v in model.value_vars}
        diffs.append(bl.log_density(prob, st) - float(logp(point)))
    return np.array(diffs)


def test_log_density_matches_pymc_centred_model_correlated(ferry) -> None:  # type: ignore[no-untyped-def]
    """Correlated lognormal/normal tastes, fixed dummies, centred constants: equal up to one constant."""
    _, panel, spec = ferry
    diffs = _pymc_logp_differences(panel, spec)
    # reference: PyMC 5's own logp of the centred model (LKJCholeskyCov, MvNormal, potential); an independent code path
    assert np.ptp(diffs) < 1e-6 * max(1.0, np.abs(diffs).max())


def test_log_density_matches_pymc_centred_model_independent_with_covariates(covariate_panel) -> None:  # type: ignore[no-untyped-def]
    _, panel, spec = covariate_panel
    diffs = _pymc_logp_differences(panel, spec)
    assert np.ptp(diffs) < 1e-6 * max(1.0, np.abs(diffs).max())


def test_log_density_negative_control_detects_a_wrong_prior(ferry) -> None:  # type: ignore[no-untyped-def]
    """The density comparison can fail: a doubled LKJ eta breaks the constant difference."""
    _, panel, spec = ferry
    prob = bl.blocked_problem(panel, spec)
    wrong = replace(prob, lkj_eta=2 * prob.lkj_eta)
    rng = np.random.default_rng(3)
    a, b = _random_state(prob, rng), _random_state(prob, rng)
    right_gap = bl.log_density(prob, a) - bl.log_density(prob, b)
    wrong_gap = bl.log_density(wrong, a) - bl.log_density(wrong, b)
    assert abs(right_gap - wrong_gap) > 1e-3


# ----------------------------------------------------------------------------- the conjugate location update


def test_conjugate_means_match_normal_normal_posterior() -> None:
    r"""With Sigma and eta fixed, the means' draws have the normal-normal posterior's mean and variance.

    Closed form (Gelman et al., Bayesian Data Analysis, 3rd ed., sec. 3.5, multivariate normal with known
    covariance): precision :math:`P = V_0^{-1} + N\Sigma^{-1}`, mean :math:`P^{-1}\Sigma^{-1}\sum_n\eta_n`.
    Per coordinate the sample mean is tested at |z| < 3.29 and the sample variance at |v/s^2 - 1| <
    3.29 sqrt(2/(n-1)) (two-sided 0.1 % each under the normal sampling distribution; 4 coordinates x 2
    checks: false-alarm rate <= 0.8 %).
    """
    sim = hc.benchmark_scenario(30, 4, 3, 4, correlated=True, seed=2)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    prob = bl.blocked_problem(panel, _centred(sim.spec))
    assert prob.conjugate and prob.centre is None
    rng = np.random.default_rng(11)
    state = _random_state(prob, rng)
    Q = np.linalg.inv(state.L @ state.L.T)
    P = np.diag(1 / prob.mean_sd**2) + prob.n_persons * Q
    cov = np.linalg.inv(P)
    mean = cov @ Q @ state.eta.sum(0)
    n = 4000
    draws = np.empty((n, prob.n_attributes))
    pop, shards = _local(prob, state)
    for i in range(n):
        _location_conjugate(prob, pop, shards, rng)
        draws[i] = pop.mu_free
    sd = np.sqrt(np.diag(cov))
    z = (draws.mean(0) - mean) / (sd / np.sqrt(n))
    assert np.all(np.abs(z) < 3.29), z
    ratio = draws.var(0, ddof=1) / sd**2
    assert np.all(np.abs(ratio - 1) < 3.29 * np.sqrt(2 / (n - 1))), ratio


def test_covariance_step_matches_quadrature_of_the_sd_conditional(covariate_panel) -> None:  # type: ignore[no-untyped-def]
    r"""Independent SDs: the corrected inverse-gamma independence sampler has the exact conditional mean.

    With eta and the means fixed, :math:`p(\sigma_k \mid \cdot) \propto \mathrm{HalfNormal}(\sigma_k; s_k)\,
    \sigma_k^{-N} e^{-S_{kk}/(2\sigma_k^2)}`; reference: its mean by scipy quadrature in this test.
    Tolerance 4 Monte Carlo SEs (ArviZ's MCSE of the chain; two-sided 6e-5 each, 2 SDs).
    """
    import arviz as az
    from scipy.integrate import quad

    _, panel, spec = covariate_panel
    prob = bl.blocked_problem(panel, spec)
    rng = np.random.default_rng(21)
    st = _random_state(prob, rng)
    resid = st.eta - bl.locations(prob, st.mu_free, st.gamma)[:, prob.rnd]
    n = resid.shape[0]
    draws = np.empty((4000, prob.n_random))
    pop, shards = _local(prob, st)
    for i in range(draws.shape[0]):
        _update_covariance(prob, pop, shards, rng, steps=1)
        draws[i] = np.diag(pop.L)
    for k in range(prob.n_random):
        skk, s = float(resid[:, k] @ resid[:, k]), float(prob.sd_sd[k])

        def dens(x, p=0, s=s, skk=skk, c=0.0):  # type: ignore[no-untyped-def]
            return x**p * np.exp(-0.5 * (x / s) ** 2 - n * np.log(x) - skk / (2 * x**2) + c)

        mode = np.sqrt(skk / n)
        scale = dens(mode)
        dens = functools.partial(dens, c=-np.log(scale))
        ref = quad(dens, 1e-6, 20 * mode, args=(1,), points=[mode])[0] / quad(dens, 1e-6, 20 * mode, points=[mode])[0]
        mcse = float(np.asarray(az.mcse(draws[None, :, k])).squeeze())
        assert abs(draws[:, k].mean() - ref) < 4 * mcse, (k, draws[:, k].mean(), ref, mcse)


def test_likelihood_cache_matches_the_state(ferry) -> None:  # type: ignore[no-untyped-def]
    """The per-person log-likelihoods and eta-gradients passed between blocks equal a fresh evaluation."""
    _, panel, spec = ferry
    prob = bl.blocked_problem(panel, spec)
    rng = np.random.default_rng(5)
    shards = LocalShards(prob, (3, 4))
    pop = bl.initial_state(prob, rng, shards)
    settings = bl.BlockedSettings()
    for i in range(30):
        bl.sweep(prob, pop, shards, rng, settings, (i + 1.0) ** -0.6 if i < 20 else None, [] if i < 20 else None)
    st = shards.shards[0].state
    for step in range(6):
        if step % 2:
            _update_persons(prob, pop, shards, 1, None, "information")
        else:
            bl.sweep(prob, pop, shards, rng, settings, None, None)  # ends with the interweaving step
        assert st.cache is not None
        beta = bl.person_betas(prob, st)
        ll, g = person_loglik_grad(prob.data, beta)
        J = np.where(prob.logn, beta[:, prob.rnd], 1.0)
        np.testing.assert_allclose(st.cache[0], ll, rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(st.cache[1], g[:, prob.rnd] * J, rtol=1e-8, atol=1e-9)


# ----------------------------------------------------------------------------- whole runs


def test_draws_do_not_depend_on_how_the_persons_are_sharded() -> None:
    """Same seed, persons in 1 or 3 in-process shards (chunks of 8 persons here): identical draws, bit for bit.

    Every per-person sum is added chunk by chunk in order and the persons' random numbers are drawn per chunk
    (hierchoice.inference.blocked.shard), so splitting the persons cannot change a draw.
    """
    from hierchoice.inference.blocked import shard as sh

    sim = hc.ferry_scenario(45, n_tasks=5, seed=4)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    prob = bl.blocked_problem(panel, _centred(sim.spec))
    assert sh.shard_bounds(45, 3, 8) == [(0, 16), (16, 32), (32, 45)]
    runs = []
    for shards in (1, 3):
        rng = np.random.default_rng(4)
        loc = LocalShards(prob, (7, 8), shards, chunk=8)
        pop = bl.initial_state(prob, rng, loc)
        for i in range(12):
            bl.sweep(prob, pop, loc, rng, bl.BlockedSettings(), (i + 1.0) ** -0.6 if i < 6 else None,
                     [] if i < 6 else None)
        runs.append((pop.mu_free, pop.L, loc.gather_eta()))
    for a, b in zip(*runs, strict=True):
        np.testing.assert_array_equal(a, b)


def test_sharded_on_a_dask_cluster_gives_the_same_draws_as_in_process(ferry) -> None:  # type: ignore[no-untyped-def]
    """The person block on a LocalCluster of 2 workers (one actor per shard): the same draws as in one process."""
    distributed = pytest.importorskip("distributed")
    from hierchoice.validation.distributed import local_cluster

    _, panel, spec = ferry
    keep = ["taste_mean", "taste_sd", "taste_corr", "person_taste"]
    here = bl.sample_blocked(panel, spec, draws=6, tune=6, chains=1, seed=5, keep=keep,
                             settings=bl.BlockedSettings(chunk=16))
    with local_cluster(2) as cluster, distributed.Client(cluster) as client:
        there = bl.sample_blocked(panel, spec, draws=6, tune=6, chains=1, seed=5, keep=keep,
                                  settings=bl.BlockedSettings(shards=2, chunk=16), client=client)
        assert len(client.scheduler_info()["workers"]) == 2
        # through fit(): the same ChoiceFit as in process; a cluster with NUTS is refused, naming the method
        a = hc.fit(panel, spec, method="blocked", draws=5, tune=5, chains=1, seed=2, progressbar=False)
        b = hc.fit(panel, spec, method="blocked", draws=5, tune=5, chains=1, seed=2, progressbar=False, client=client)
        np.testing.assert_array_equal(a.posterior["taste_sd"].values, b.posterior["taste_sd"].values)
        with pytest.raises(SpecError, match="blocked sampler only"):
            hc.fit(panel, spec, method="nuts", draws=5, tune=5, chains=1, client=client)
    for v in keep:
        np.testing.assert_array_equal(here.posterior[v].values, there.posterior[v].values)


def test_same_seed_same_draws_different_seed_different(ferry) -> None:  # type: ignore[no-untyped-def]
    _, panel, spec = ferry
    keep = ["taste_mean", "taste_sd", "taste_corr", "person_taste"]
    a = bl.sample_blocked(panel, spec, draws=15, tune=15, chains=2, seed=5, keep=keep)
    b = bl.sample_blocked(panel, spec, draws=15, tune=15, chains=2, seed=5, keep=keep)
    c = bl.sample_blocked(panel, spec, draws=15, tune=15, chains=2, seed=6, keep=keep)
    for v in keep:
        np.testing.assert_array_equal(a.posterior[v].values, b.posterior[v].values)
    assert not np.allclose(a.posterior["taste_mean"].values, c.posterior["taste_mean"].values)
    # the two chains of one run are different streams
    assert not np.allclose(a.posterior["taste_mean"].values[0], a.posterior["taste_mean"].values[1])


def test_results_do_not_depend_on_the_parallel_kernel(ferry) -> None:  # type: ignore[no-untyped-def]
    """The per-person random numbers come from the caller: the parallel and serial MALA passes agree exactly."""
    from hierchoice.inference.blocked.kernels import _MALA

    _, panel, spec = ferry
    prob = bl.blocked_problem(panel, spec)
    rng = np.random.default_rng(2)
    st = _random_state(prob, rng)
    beta_fixed = bl.locations(prob, st.mu_free, st.gamma)
    m = np.ascontiguousarray(beta_fixed[:, prob.rnd])
    xi = rng.standard_normal((2, prob.n_persons, prob.n_random))
    log_u = np.log(rng.random((2, prob.n_persons)))
    Q = np.linalg.inv(st.L @ st.L.T)
    R = np.ascontiguousarray(np.broadcast_to(np.linalg.cholesky(Q), (prob.n_persons,) + Q.shape))
    out = []
    for kernel in _MALA:
        eta, acc, ll = st.eta.copy(), np.empty(prob.n_persons), np.empty(prob.n_persons)
        g = np.empty((prob.n_persons, prob.n_random))
        d = prob.data
        kernel(d.D, d.task_ptr, d.person_ptr, d.max_others, beta_fixed, eta, m, st.L, R, prob.rnd, prob.logn, prob.sign,
               np.full(prob.n_persons, 0.3), xi, log_u, False, ll, g, acc, ll, g)
        out.append((eta, acc))
    np.testing.assert_array_equal(out[0][0], out[1][0])
    assert not np.array_equal(out[0][0], st.eta)  # some persons moved


def test_wtp_space_is_refused_naming_the_feature(ferry) -> None:  # type: ignore[no-untyped-def]
    sim, _, _ = ferry
    spec = copy.deepcopy(sim.spec)
    spec["model"] = spec["model"] | {"wtp_space": True, "price": "fare"}
    panel = hc.ChoicePanel.from_frame(sim.data, spec)
    with pytest.raises(SpecError, match="willingness-to-pay space"):
        hc.fit(panel, spec, method="blocked", draws=5, tune=5, chains=1, progressbar=False)


def test_unknown_method_is_refused(ferry) -> None:  # type: ignore[no-untyped-def]
    _, panel, _ = ferry
    with pytest.raises(SpecError, match="blocked"):
        hc.fit(panel, method="gibbs")


def test_fit_blocked_returns_a_choicefit_the_checks_read(ferry) -> None:  # type: ignore[no-untyped-def]
    sim, panel, _ = ferry
    res = hc.fit(panel, sim.spec, method="blocked", draws=20, tune=20, chains=2, seed=1, progressbar=False)
    assert isinstance(res, hc.ChoiceFit)
    assert res.info["method"] == bl.METHOD_NAME and res.info["approximate"] is False
    post = res.posterior
    for v in ("taste_mean", "taste_sd", "taste_corr", "person_taste"):
        assert v in post
    assert post["person_taste"].dims == ("chain", "draw", "person", "attribute")
    assert "log_likelihood" in res.idata.groups()
    assert not res.idata.sample_stats["diverging"].values.any()
    assert 0 < float(res.idata.sample_stats["person_accept"].mean()) < 1
    checks = hc.convergence_checks(res)
    names = {c.check for c in checks}
    assert "block_acceptance" in names and "ebfmi" not in names  # graded on its own statistics
    # fare is lognormal with a negative sign: every person's coefficient is negative
    assert float(post["person_taste"].sel(attribute="fare").max()) < 0


def _agree_with_nuts(sim, nuts_draws: int, blocked_draws: int) -> None:  # type: ignore[no-untyped-def]
    import arviz as az

    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    nuts = hc.fit(panel, sim.spec, draws=nuts_draws, tune=nuts_draws, chains=2, seed=3, backend="pymc",
                  progressbar=False)
    blk = hc.fit(panel, sim.spec, method="blocked", draws=blocked_draws, tune=1000, chains=2, seed=3,
                 progressbar=False)
    for v in ("taste_mean", "taste_sd", "taste_corr"):
        if v not in nuts.posterior:
            continue
        a, b = nuts.posterior[v], blk.posterior[v]
        se = np.sqrt(az.mcse(a)[v].values ** 2 + az.mcse(b)[v].values ** 2)
        z = (a.mean(("chain", "draw")).values - b.mean(("chain", "draw")).values) / np.where(se > 0, se, 1.0)
        assert np.all(np.abs(z) < 4), (v, z)


@pytest.mark.slow
def test_blocked_agrees_with_nuts_with_fixed_tastes_and_centred_constants() -> None:
    """The general path (MALA location block with fixed tastes, constant centring through a lognormal fare,
    correlated tastes): posterior means within 4 combined MCSEs of PyMC's NUTS (about 20 parameters: false alarm
    <= 0.2 % under the normal approximation)."""
    _agree_with_nuts(hc.ferry_scenario(120, n_tasks=8, seed=4), 800, 3000)


@pytest.mark.slow
def test_blocked_agrees_with_nuts_on_a_small_model() -> None:
    """Posterior means of taste_mean / taste_sd within 4 combined Monte Carlo SEs of NUTS (PyMC's own sampler).

    |z| < 4 per parameter (two-sided 6e-5 under the normal approximation of both MCSEs; 8 parameters: false
    alarm <= 0.1 %).
    """
    _agree_with_nuts(hc.benchmark_scenario(150, 8, 3, 3, correlated=False, seed=5), 800, 2000)


def test_cli_fit_method_blocked(ferry, tmp_path) -> None:  # type: ignore[no-untyped-def]
    """``hierchoice fit --method blocked`` writes a results folder; --approximate with --method blocked is refused."""
    from hierchoice.cli import main
    from hierchoice.spec import dumps_toml

    sim, _, _ = ferry
    data = tmp_path / "ferry.csv"
    sim.data.to_csv(data, index=False)
    spec = tmp_path / "ferry.toml"
    spec.write_text(dumps_toml(sim.spec))
    args = ["fit", str(data), "--spec", str(spec), "--draws", "10", "--tune", "10", "--chains", "1", "--quiet"]
    assert main(args + ["--out", str(tmp_path / "out"), "--method", "blocked"]) == 0
    assert (tmp_path / "out" / "posterior.nc").exists() or any((tmp_path / "out").iterdir())
    assert main(args + ["--out", str(tmp_path / "out2"), "--method", "blocked", "--approximate"]) != 0


def test_a_blocked_fit_is_graded_on_its_own_statistics():
    # the blocked sampler has no trajectories: E-BFMI and tree depth do not apply, block acceptance does
    from hierchoice.diagnostics.checks import BLOCK_ACCEPT_MIN, blocked_sampler_checks, sampler_checks

    sim = hc.ferry_scenario(30, n_tasks=6, seed=4, correlated=False)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    result = hc.fit(panel, method="blocked", draws=60, tune=60, chains=2, seed=3, progressbar=False)
    checks = sampler_checks(result.idata)
    assert {c.check for c in checks} == {"block_acceptance"}
    assert {c.subject for c in checks} >= {"person"}
    assert all(c.verdict == "pass" for c in checks), [(c.subject, c.value) for c in checks]
    # negative control: a block that never accepts is flagged
    stats = result.idata.sample_stats.copy()
    stats["person_accept"] = stats["person_accept"] * 0.0
    stuck = [c for c in blocked_sampler_checks(stats) if c.subject == "person"][0]
    assert stuck.verdict == "warn" and stuck.value < BLOCK_ACCEPT_MIN


def test_a_blocked_fit_without_person_draws_reports_the_same_population():
    # store_person_draws = false (as the calibration fitter sets it) must give the same population draws
    sim = hc.ferry_scenario(30, n_tasks=6, seed=4, correlated=True)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    kw = dict(method="blocked", draws=70, tune=40, chains=1, seed=8, progressbar=False)
    full = hc.fit(panel, **kw)
    bare = hc.fit(panel, panel.spec.with_sampling(store_person_draws=False), **kw)
    assert not bare.has_person_draws and list(bare.posterior["draw"].values) == list(range(70))
    for name in ("taste_mean", "taste_sd", "taste_corr"):
        np.testing.assert_allclose(bare.posterior[name].values, full.posterior[name].values, rtol=1e-12)


def test_auto_picks_nuts_for_small_panels_and_blocked_for_large_ones(monkeypatch):
    # the rule of docs/blocked.md: NUTS below AUTO_BLOCKED_PERSONS persons, the blocked sampler from there on
    # when it supports the model; never the approximate path
    import hierchoice.inference.sampling as sampling

    sim = hc.ferry_scenario(30, n_tasks=6, seed=4, correlated=True)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    assert panel.spec.sampling.method == "auto"
    assert sampling.choose_method(panel) == "nuts"
    monkeypatch.setattr(sampling, "AUTO_BLOCKED_PERSONS", 30)
    assert sampling.choose_method(panel) == "blocked"
    fixed_only = copy.deepcopy(panel.spec.to_dict())
    for attr in fixed_only["attributes"].values():
        attr["taste"] = "fixed"
        attr.pop("sign", None)
    fixed_only["model"]["correlated"] = False
    assert sampling.choose_method(panel, fixed_only) == "nuts"  # nothing random: the blocked sampler does not apply
    result = hc.fit(panel, draws=30, tune=30, chains=1, seed=2, progressbar=False)
    assert result.info["backend"] == "blocked" and result.spec.sampling.method == "blocked"


def test_triangular_solve_equals_lapack() -> None:
    """The compiled substitution the population blocks use against scipy's LAPACK ``solve_triangular``."""
    from scipy.linalg import solve_triangular

    from hierchoice.inference.blocked.problem import _solve_lower

    rng = np.random.default_rng(11)
    L = np.linalg.cholesky(np.cov(rng.normal(size=(5, 40))))
    for B in (np.eye(5), rng.normal(size=(5, 1)), rng.normal(size=(5, 3000)), rng.normal(size=5)):
        for trans in (0, 1):
            np.testing.assert_allclose(_solve_lower(L, B, trans=trans), solve_triangular(L, B, lower=True, trans=trans),
                                       rtol=1e-12, atol=1e-12)
