"""The population blocks of one sweep: persons (dispatch), location, covariance, and interweaving (ASIS).

Each update leaves the joint posterior invariant. The persons live in shards (:mod:`.shard`): these
functions send the population parameters and get back sums over persons. May import: :mod:`.problem`,
:mod:`.shard`.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .problem import (
    MALA_TARGET,
    BlockedProblem,
    PopulationState,
    _cov_log_prior,
    _location_log_prior,
    _sd_log_prior,
    _solve_lower,
    chol_log_prior,
    population_means,
)


def _update_persons(prob: BlockedProblem, pop: PopulationState, shards: Any, steps: int,
                    adapt_rate: float | None, precondition: str) -> None:
    """MALA on every person's eta, in the shards (:func:`.shard.update_persons`); records the block's statistics.

    ``person_step_size`` is the geometric mean of the persons' step sizes (a sum, so the shards can add it).
    """
    sums = shards.reduce("persons", pop.mu_free, pop.gamma, pop.L, pop.sweep, steps, adapt_rate, precondition)
    pop.stats["person_accept"] = float(sums[0] / prob.n_persons)
    pop.stats["person_step_size"] = float(math.exp(sums[1] / prob.n_persons))


def _location_conjugate(prob: BlockedProblem, pop: PopulationState, shards: Any, rng: np.random.Generator) -> None:
    r"""Exact draw of (``mu_std``, ``gamma_std``) given eta and Sigma: Bayesian multivariate regression.

    With every taste random, :math:`m_n = A\tilde\mu + E\,\Gamma^\top z_n` (``A`` the linear
    constant centring, ``E`` placing the shifted columns), the conditional is normal with
    precision :math:`A^\top V_0^{-1} A + \sum_n X_n^\top \Sigma^{-1} X_n` (the prior :math:`N(0, V_0)` is on
    :math:`\mu = A\tilde\mu`) and mean
    precision\ :sup:`-1` :math:`\sum_n X_n^\top \Sigma^{-1}\eta_n`, computed from the sufficient
    statistics :math:`\sum\eta_n, \sum\eta_n z_n^\top, \sum z_n, \sum z_n z_n^\top` (Rossi, Allenby &
    McCulloch 2005, ch. 2.12).
    """
    K = prob.n_attributes
    C, S = prob.n_covariates, prob.shifted.size
    r = prob.n_random
    A = np.eye(K)
    if prob.centre is not None:
        A = A - prob.centre * prob.lin[None, :]
    Q = np.linalg.inv(pop.L @ pop.L.T)  # rnd == all attributes here
    v = shards.reduce("location_stats")
    Se, v = v[:r], v[r:]
    Sez, v = v[: r * C].reshape(r, C), v[r * C:]
    Sz, Szz = v[:C], v[C:].reshape(C, C)
    E = np.zeros((K, S))
    E[prob.shifted, np.arange(S)] = 1.0
    d = K + C * S
    P = np.zeros((d, d))
    b = np.zeros(d)
    P[:K, :K] = A.T @ (prob.n_persons * Q + np.diag(1.0 / prob.mean_sd**2)) @ A  # the prior is on mu = A mu_free
    b[:K] = A.T @ Q @ Se
    if C * S:
        QE = Q @ E
        P[:K, K:] = np.kron(Sz[None, :], A.T @ QE)
        P[K:, :K] = P[:K, K:].T
        P[K:, K:] = np.kron(Szz, E.T @ QE) + np.eye(C * S) / prob.gamma_sd**2
        b[K:] = (Sez.T @ QE).reshape(-1)
    R = np.linalg.cholesky(P)
    mean = np.linalg.solve(R.T, np.linalg.solve(R, b))
    draw = mean + np.linalg.solve(R.T, rng.standard_normal(d))
    pop.mu_free = draw[:K]
    pop.gamma = draw[K:].reshape(C, S)
    pop.stats["location_accept"] = 1.0


def _location_terms(prob: BlockedProblem, pop: PopulationState, shards: Any, x: np.ndarray) -> tuple[float, np.ndarray]:
    r"""Log full conditional of ``x`` = (``mu_std``, ``gamma_std`` flattened) and its gradient.

    Priors, the persons' normal density and, with fixed tastes, the full-data likelihood through
    the fixed coefficients :math:`\theta_{nk} = \mu_k + \gamma_k^\top z_n`. With
    :math:`D_{nk} = [\Sigma^{-1}(\eta_n - m_n)]_k` on random and :math:`\partial\ell_n/\partial\beta_{nk}`
    on fixed columns (:func:`.shard.location_parts`), :math:`\partial/\partial\mu = \sum_n D_n`,
    :math:`\partial/\partial\gamma_{ck} = \sum_n z_{nc} D_{nk}` and, through the constant centring
    :math:`\mu = \tilde\mu - C\bar\beta(\tilde\mu)`,
    :math:`\partial/\partial\tilde\mu = (I - C\,\mathrm{diag}\,\bar\beta'(\tilde\mu))^\top\partial/\partial\mu`,
    the prior's :math:`-\mu/\sigma_0^2` included (the prior is on :math:`\mu`).
    """
    K = prob.n_attributes
    C, S = prob.n_covariates, prob.shifted.size
    mu_free, gamma = x[:K], x[K:].reshape(C, S)
    v = shards.reduce("location_terms", mu_free, gamma, pop.L)
    yy, ll, Dsum, ZD = v[0], v[1], v[2:2 + K], v[2 + K:].reshape(C, S)
    lp = _location_log_prior(prob, mu_free, gamma) - 0.5 * float(yy) + float(ll)
    # the prior is on mu (population_means), so its gradient goes through the centring's Jacobian too
    grad_mu = _mean_jacobian(prob, mu_free).T @ (Dsum - population_means(prob, mu_free) / prob.mean_sd**2)
    grad_gamma = ZD - gamma / prob.gamma_sd**2 if S else gamma[:0]
    return lp, np.concatenate([grad_mu, np.ravel(grad_gamma)])


def _location_mala(prob: BlockedProblem, state: PopulationState, shards: Any, rng: np.random.Generator, steps: int,
                   adapt_rate: float | None, history: list[np.ndarray] | None) -> None:
    r"""MALA on (``mu_std``, ``gamma_std``) with the full-data gradient: the general case.

    Preconditioner: the covariance of the warm-up path (adaptive Metropolis, Haario et al.
    2001), frozen after warm-up; step size adapted towards acceptance 0.574.
    """
    K = prob.n_attributes
    shape = state.gamma.shape
    x = np.concatenate([state.mu_free, state.gamma.reshape(-1)])
    d = x.size
    cov = state.loc_cov if state.loc_cov is not None else np.eye(d) * 0.01
    C = np.linalg.cholesky(cov + 1e-12 * np.eye(d))
    h = state.loc_scale
    lp, grad = _location_terms(prob, state, shards, x)
    acc = 0.0
    for _ in range(steps):
        mean_f = x + 0.5 * h * h * (cov @ grad)
        prop = mean_f + h * (C @ rng.standard_normal(d))
        lp_p, grad_p = _location_terms(prob, state, shards, prop)
        a = 0.0
        if np.isfinite(lp_p):
            mean_b = prop + 0.5 * h * h * (cov @ grad_p)
            log_q_f = -0.5 * np.sum(_solve_lower(C, (prop - mean_f)[:, None]) ** 2) / h**2
            log_q_b = -0.5 * np.sum(_solve_lower(C, (x - mean_b)[:, None]) ** 2) / h**2
            log_a = lp_p - lp + log_q_b - log_q_f
            a = math.exp(min(0.0, log_a)) if np.isfinite(log_a) else 0.0
        u = rng.random()
        if u < a:
            x, lp, grad = prop, lp_p, grad_p
        acc += a
        if adapt_rate is not None:
            h = float(np.clip(h * math.exp(adapt_rate * (a - MALA_TARGET)), 1e-4, 3.0))
    state.mu_free, state.gamma = x[:K].copy(), x[K:].reshape(shape).copy()
    state.loc_scale = h
    state.stats["location_accept"] = acc / steps
    if history is not None:  # warm-up: preconditioner from the second half of the path so far
        history.append(x.copy())
        if len(history) >= 20 and len(history) % 10 == 0:
            if state.loc_cov is None:
                state.loc_scale = 1.0  # the step size was tuned to the provisional preconditioner
            state.loc_cov = np.cov(np.array(history[len(history) // 2:]).T).reshape(d, d) + 1e-10 * np.eye(d)


def _update_covariance(prob: BlockedProblem, state: PopulationState, shards: Any, rng: np.random.Generator,
                       steps: int = 2) -> None:
    r"""Independence Metropolis–Hastings for Sigma with the conjugate proposal, corrected to the model's prior.

    Proposal: :math:`\Sigma^* \sim IW(\Psi_0 + S, \nu_0 + N)` (correlated) or
    :math:`\sigma_k^{*2} \sim IG(a_0 + N/2, b_0 + S_{kk}/2)` (independent), the exact
    conditional under a stand-in prior :math:`p_0`; with the model's prior :math:`p` the
    acceptance ratio is :math:`\frac{p(\Sigma^*)/p_0(\Sigma^*)}{p(\Sigma)/p_0(\Sigma)}`, where
    :math:`p` on :math:`\Sigma` is the density on ``L`` divided by the Jacobian
    :math:`2^n\prod_i L_{ii}^{\,n-i}` of :math:`L \mapsto LL^\top`. The likelihood cancels, so the
    cost is that of the scatter matrix :math:`S = \sum_n (\eta_n - m_n)(\eta_n - m_n)^\top`.
    """
    r = prob.n_random
    n = prob.n_persons
    S = shards.reduce("scatter", state.mu_free, state.gamma).reshape(r, r)
    acc = 0.0
    if prob.layout.correlated:
        from scipy.stats import invwishart

        nu0 = r + 2.0
        psi0 = np.diag(prob.sd_sd**2) * (nu0 - r - 1.0) * 0.25

        def log_ratio(L: np.ndarray) -> float:  # log p(Sigma) - log p0(Sigma)
            diag = np.diag(L)
            logdet = 2.0 * np.sum(np.log(diag))
            jac = float(np.sum((r - np.arange(r)) * np.log(diag)))
            Linv = _solve_lower(L, np.eye(r))
            tr = float(np.sum((Linv @ psi0) * Linv))  # tr(psi0 Sigma^-1) = tr(Linv psi0 Linv^T)
            lp0 = -0.5 * (nu0 + r + 1.0) * logdet - 0.5 * tr
            return chol_log_prior(prob, L) - jac - lp0

        cur = log_ratio(state.L)
        for _ in range(steps):
            sigma = invwishart.rvs(df=nu0 + n, scale=psi0 + S, random_state=rng)
            L_new = np.linalg.cholesky(np.atleast_2d(sigma))
            new = log_ratio(L_new)
            a = min(1.0, math.exp(min(0.0, new - cur)))
            acc += a
            if rng.random() < a:
                state.L, cur = L_new, new
    else:
        a0 = 1.0
        b0 = 0.25 * prob.sd_sd**2
        sd = np.diag(state.L).copy()
        for _ in range(steps):
            v = (b0 + 0.5 * np.diag(S)) / rng.gamma(a0 + 0.5 * n, 1.0, size=r)
            sd_new = np.sqrt(v)
            # per SD: log HalfNormal(sd) - log(2 sd) [the density of v = sd^2] - log IG0(v)
            def ratio(s: np.ndarray) -> np.ndarray:
                return -0.5 * (s / prob.sd_sd) ** 2 - np.log(s) + (a0 + 1.0) * 2 * np.log(s) + b0 / s**2

            log_a = ratio(sd_new) - ratio(sd)
            take = np.log(rng.random(r)) < log_a
            acc += float(np.mean(np.minimum(1.0, np.exp(np.minimum(0.0, log_a)))))
            sd = np.where(take, sd_new, sd)
        state.L = np.diag(sd)
    state.stats["cov_accept"] = acc / steps
    _slice_covariance(prob, state, S, n, rng)


def _cov_conditional(prob: BlockedProblem, S: np.ndarray, n: int) -> Any:
    r"""Log density of the unconstrained covariance coordinates given the scatter ``S`` of ``n`` persons.

    Coordinates: :math:`u = (\log L_{ii}, L_{ij})_{i>j}` (correlated) or :math:`\log\sigma_k` (independent). The
    density is the model's prior on ``L`` (or the SDs) times :math:`\prod_n N(\eta_n; m_n, LL^	op)`, i.e.
    :math:`-n\sum_i \log L_{ii} - 	frac12 \mathrm{tr}((LL^	op)^{-1}S)`, times the Jacobian :math:`\prod_i L_{ii}`
    of the log. Its cost depends on the number of random tastes only.
    """
    r = S.shape[0]
    rows, cols = np.tril_indices(r)
    diag = rows == cols

    def to_L(u: np.ndarray) -> np.ndarray:
        L = np.zeros((r, r))
        L[rows, cols] = np.where(diag, np.exp(u), u)
        return L

    def logp(u: np.ndarray) -> float:
        L = to_L(u)
        d = np.diag(L)
        Linv = _solve_lower(L, np.eye(r))
        quad = float(np.sum((Linv @ S) * Linv))
        lp = _cov_log_prior(prob, L)
        return lp - n * float(np.sum(np.log(d))) - 0.5 * quad + float(np.sum(np.log(d)))

    return rows, cols, diag, to_L, logp


def _slice_covariance(prob: BlockedProblem, state: PopulationState, S: np.ndarray, n: int,
                      rng: np.random.Generator, width: float = 0.5, max_steps: int = 20) -> None:
    """One sweep of univariate slice sampling (stepping out, shrinkage; Neal 2003) over the covariance coordinates.

    Leaves the same conditional invariant as the independence step above, and keeps moving where that step's
    proposal fits the model's prior badly (few persons, priors that matter): no tuning, exact, and its cost does not
    grow with the persons.
    """
    rows, cols, diag, to_L, logp = _cov_conditional(prob, S, n)
    L = state.L if prob.layout.correlated else np.diag(np.diag(state.L))
    u = np.where(diag, np.log(np.maximum(L[rows, cols], 1e-300)), L[rows, cols])
    coords = range(len(u)) if prob.layout.correlated else np.flatnonzero(diag)
    cur = logp(u)
    for j in coords:
        level = cur + math.log(rng.random())
        lo = u[j] - width * rng.random()
        hi = lo + width
        x = u.copy()
        for _ in range(max_steps):  # step out
            x[j] = lo
            if logp(x) <= level:
                break
            lo -= width
        for _ in range(max_steps):
            x[j] = hi
            if logp(x) <= level:
                break
            hi += width
        while True:  # shrink
            x[j] = lo + (hi - lo) * rng.random()
            val = logp(x)
            if val > level:
                u, cur = x, val
                break
            if x[j] < u[j]:
                lo = x[j]
            else:
                hi = x[j]
    L_new = to_L(u)
    state.L = L_new if prob.layout.correlated else np.diag(np.diag(L_new))


def _cov_prior_grad(prob: BlockedProblem, L: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
    r"""Log prior of ``L`` (up to a constant), its gradient and a positive curvature, on the sampled entries.

    Correlated (PyMC's ``LKJCholeskyCov`` density, :func:`chol_log_prior`), with
    :math:`c_i = 2\eta - 2 + n - i` and :math:`\sigma_i = \lVert L_{i\cdot}\rVert`:

    .. math:: \log p(L) = \sum_i \Big[-\frac{\sigma_i^2}{2s_i^2} + c_i \log L_{ii} - (c_i + i)\log\sigma_i\Big],
              \quad \frac{\partial \log p}{\partial L_{ij}} = -\frac{L_{ij}}{s_i^2}
              + [i = j]\frac{c_i}{L_{ii}} - (c_i + i)\frac{L_{ij}}{\sigma_i^2}.

    Independent: HalfNormal SDs on the diagonal. The curvature (``1/s_i^2`` plus
    ``c_i/L_ii^2`` on the diagonal) only shapes the proposal.
    """
    r = prob.n_random
    rows, cols = _entries(prob)
    s2 = prob.sd_sd[rows] ** 2
    if not prob.layout.correlated:
        sd = np.diag(L)
        return _sd_log_prior(prob, sd), -sd / prob.sd_sd**2, 1.0 / prob.sd_sd**2
    lp = chol_log_prior(prob, L)
    sd2 = np.sum(L * L, axis=1)
    c = 2 * prob.lkj_eta - 2 + r - np.arange(r)
    vals = L[rows, cols]
    diag = rows == cols
    grad = -vals / s2 - (c + np.arange(r))[rows] * vals / sd2[rows]
    grad[diag] += c / np.diag(L)
    curv = 1.0 / s2
    curv[diag] += c / np.diag(L) ** 2
    return lp, grad, curv


def _entries(prob: BlockedProblem) -> tuple[np.ndarray, np.ndarray]:
    """Row and column of each sampled entry of ``L``: the lower triangle (correlated) or the diagonal."""
    r = prob.n_random
    return np.tril_indices(r) if prob.layout.correlated else (np.arange(r), np.arange(r))


def _mean_jacobian(prob: BlockedProblem, mu_free: np.ndarray) -> np.ndarray:
    r"""(attribute, attribute) Jacobian :math:`A = \partial\mu/\partial\tilde\mu = I - C\,\mathrm{diag}\,\bar\beta'(\tilde\mu)`
    of the constant centring (:func:`~.problem.population_means`); the identity without it."""
    K = prob.n_attributes
    if prob.centre is None:
        return np.eye(K)
    dcoef = np.where(prob.lin, 1.0, prob.coef_sign * np.exp(np.where(prob.lin, 0.0, mu_free)))
    return np.eye(K) - prob.centre * dcoef[None, :]


def _asis_terms(prob: BlockedProblem, state: PopulationState, shards: Any, x: np.ndarray, metric: bool = True,
                use_cache: bool = False, slot: int = 0) -> tuple[Any, ...]:
    r"""Log conditional of ``x`` = (entries of ``L``, every free mean ``mu_std``) given ``e``, its gradient and a metric.

    Non-centred: :math:`\eta_n = m_n + L e_n` on the random columns, :math:`\beta_{nk} = \theta_{nk}` on the fixed
    ones, with :math:`\theta_n = \mu(\tilde\mu) + \Gamma^\top z_n` and :math:`e_n` fixed in the shards
    (:meth:`.shard.PersonShard.asis_begin`). With :math:`\tilde g_n` the gradient of :math:`\ell_n` in
    :math:`\theta_n` (:math:`J_n\nabla_\beta\ell_n`, :math:`J` the lognormal chain rule) the gradient is
    :math:`\partial/\partial L_{ab} = \sum_n \tilde g_{na} e_{nb}` and
    :math:`\partial/\partial\tilde\mu = A^\top(\sum_n \tilde g_n - V_0^{-1}\mu)` (:func:`_mean_jacobian`, the
    constant centring; :math:`V_0` the means' prior covariance, on :math:`\mu`).
    The metric is the expected information :math:`G_{(ab),(cd)} = \sum_n \tilde F_{n,ac}\, e_{nb} e_{nd}`,
    :math:`G_{(ab),\tilde\mu} = \sum_n \tilde F_{n,a\cdot}\,e_{nb}\,A`,
    :math:`G_{\tilde\mu\tilde\mu} = A^\top(\sum_n\tilde F_n + V_0^{-1})A`, plus the covariance prior's curvature
    (Girolami & Calderhead 2011, simplified manifold MALA). Returns ``(log density, gradient, metric or None)``; ``-inf`` outside the
    support. The shards keep the point's persons under ``slot`` (:meth:`.shard.PersonShard.asis_end` takes one);
    ``use_cache``: reuse the likelihood cache (only at the current point, without the metric).
    """
    r, K = prob.n_random, prob.n_attributes
    rows, cols = _entries(prob)
    n_l = rows.size
    L = np.zeros((r, r))
    L[rows, cols] = x[:n_l]
    if np.any(np.diag(L) <= 0):
        return -np.inf, x, None
    mu_free = x[n_l:]
    v = shards.reduce("asis_eval", L, mu_free, metric, use_cache, slot)
    ll, v = v[0], v[1:]
    GL, v = v[: r * r].reshape(r, r), v[r * r:]
    gsum, v = v[:K], v[K:]
    A = _mean_jacobian(prob, mu_free)
    lp_l, grad_l, curv_l = _cov_prior_grad(prob, L)
    lp = float(ll) + lp_l + _location_log_prior(prob, mu_free, state.gamma)
    mu = population_means(prob, mu_free)  # the prior is on mu: its gradient goes through A too
    grad = np.concatenate([GL[rows, cols] + grad_l, A.T @ (gsum - mu / prob.mean_sd**2)])
    if not metric:
        return lp, grad, None
    M, v = v[: r**4].reshape(r, r, r, r), v[r**4:]  # [a, c, b, d]
    Mmu, Fsum = v[: r * K * r].reshape(r, K, r), v[r * K * r:].reshape(K, K)  # Mmu[a, c, b]
    G = np.zeros((x.size, x.size))
    G[:n_l, :n_l] = M[rows[:, None], rows[None, :], cols[:, None], cols[None, :]]
    G[:n_l, n_l:] = Mmu[rows, :, cols] @ A
    G[n_l:, :n_l] = G[:n_l, n_l:].T
    G[n_l:, n_l:] = A.T @ (Fsum + np.diag(1 / prob.mean_sd**2)) @ A
    G[np.arange(n_l), np.arange(n_l)] += curv_l
    G += 1e-9 * np.eye(x.size) * max(1.0, float(np.abs(np.diag(G)).max()))
    return lp, grad, G


def _asis(prob: BlockedProblem, state: PopulationState, shards: Any, rng: np.random.Generator, steps: int,
          adapt_rate: float | None) -> None:
    r"""Interweaving: simplified manifold MALA on ``L`` and the free means in the non-centred form.

    With :math:`e_n = L^{-1}(\eta_n - m_n)` fixed (standard normal a priori, free of
    :math:`L` and :math:`\tilde\mu`), the conditional of :math:`(L, \tilde\mu)` is the prior times the
    full-data likelihood of :math:`\eta_n = m_n + L e_n` and of the fixed coefficients (Yu & Meng 2011,
    JCGS 20: the ancillary half of the interweaving). Every mean moves, fixed tastes' and constants' (through
    the constant centring) included: in the centred blocks a mean is pinned by the persons' tastes to within
    :math:`\sigma/\sqrt N`, which crawls when an SD is small. Proposal
    :math:`x' \sim N(x + \tfrac{h^2}{2}G(x)^{-1}\nabla\log\pi(x),\ h^2 G(x)^{-1})` with
    :math:`G` the expected information (:func:`_asis_terms`), accepted with the
    Metropolis–Hastings ratio that includes :math:`G` at both ends (Girolami & Calderhead 2011).
    """
    r = prob.n_random
    rows, cols = _entries(prob)
    n_l = rows.size
    shards.call("asis_begin", state.mu_free, state.gamma, state.L)
    x = np.concatenate([state.L[rows, cols], state.mu_free])
    h = state.asis_scale
    # warm-up: the metric at both ends (simplified manifold MALA); sampling: the metric frozen at the end of
    # warm-up (a fixed preconditioner), so each step needs only the likelihood and its gradient
    frozen = adapt_rate is None and state.asis_metric is not None
    if frozen:
        lp, grad, _ = _asis_terms(prob, state, shards, x, metric=False, use_cache=True, slot=0)
        C = state.asis_metric
    else:
        lp, grad, G = _asis_terms(prob, state, shards, x, slot=0)
        C = np.linalg.cholesky(G)
    cur = 0
    acc = 0.0
    for step in range(1, steps + 1):
        mean_f = x + 0.5 * h * h * _chol_solve(C, grad)
        prop = mean_f + h * _solve_lower(C, rng.standard_normal(x.size)[:, None], trans=1)[:, 0]
        lp_p, grad_p, G_p = _asis_terms(prob, state, shards, prop, metric=not frozen, slot=step)
        a = 0.0
        if np.isfinite(lp_p):
            C_p = C if frozen else np.linalg.cholesky(G_p)
            mean_b = prop + 0.5 * h * h * _chol_solve(C_p, grad_p)
            log_q_f = np.sum(np.log(np.diag(C))) - 0.5 * np.sum((C.T @ (prop - mean_f)) ** 2) / h**2
            log_q_b = np.sum(np.log(np.diag(C_p))) - 0.5 * np.sum((C_p.T @ (x - mean_b)) ** 2) / h**2
            log_a = lp_p - lp + log_q_b - log_q_f
            a = math.exp(min(0.0, log_a)) if np.isfinite(log_a) else 0.0
            if rng.random() < a:
                x, lp, grad, C, cur = prop, lp_p, grad_p, C_p, step
        else:
            rng.random()  # keep the stream aligned whether or not the proposal left the support
        acc += a
        if adapt_rate is not None:
            h = float(np.clip(h * math.exp(adapt_rate * (a - MALA_TARGET)), 1e-3, 2.0))
    if adapt_rate is not None:
        state.asis_metric = C
    L = np.zeros((r, r))
    L[rows, cols] = x[:n_l]
    state.L = L
    state.mu_free = x[n_l:].copy()
    shards.call("asis_end", cur, state.L, state.mu_free)
    state.asis_scale = h
    state.stats["asis_accept"] = acc / max(steps, 1)
    state.stats["asis_step_size"] = h


def _chol_solve(C: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve ``C C^T x = b`` for lower-triangular ``C``."""
    y = _solve_lower(C, b[:, None])
    return _solve_lower(C, y, trans=1)[:, 0]


# --------------------------------------------------------------------------- chains


