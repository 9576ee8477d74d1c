r"""The persons of the blocked sampler, in shards: all per-person work, and the sums the population blocks need.

A :class:`PersonShard` holds a contiguous range of persons: their data (in the kernels' layout), their
latent tastes :math:`\eta_n`, MALA step sizes, frozen preconditioners and likelihood cache. The
population blocks (:mod:`.updates`) never see a person: they send the population parameters to every
shard and get back **sums over persons** (sufficient statistics, log-likelihoods and gradients of the
full-data conditionals). So the shards can live in this process (:class:`LocalShards`, one shard) or
on Dask workers (:class:`DaskShards`, :mod:`.distributed`), and only a few numbers per sweep travel.

Same draws wherever the persons live: every sum is returned per **chunk** of :data:`CHUNK` persons
(chunk ``c`` holds persons ``c*CHUNK .. (c+1)*CHUNK - 1`` of the whole panel; shards hold whole chunks)
and the driver adds the chunks in order, so a sum does not depend on how the chunks are split over
shards; and the persons' random numbers are drawn per (sweep, chunk) from
``numpy.random.default_rng([key, sweep, chunk])``, not from one stream.

May import: :mod:`.problem`, :mod:`.kernels`.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace
from typing import Any

import numpy as np

from .kernels import mala_persons, person_loglik_grad, person_loglik_grad_info
from .problem import MALA_TARGET, BlockedProblem, BlockedState, _person_information_eta, _solve_lower, locations

#: Persons per chunk: the unit of every per-person sum and of the persons' random streams.
CHUNK = 2048


def restrict(prob: BlockedProblem, start: int, stop: int) -> BlockedProblem:
    """``prob`` with the data of persons ``start .. stop - 1`` only (the population fields unchanged)."""
    return replace(prob, data=prob.data.persons(slice(start, stop)), Z=prob.Z[start:stop])


def shard_bounds(n_persons: int, shards: int, chunk: int = CHUNK) -> list[tuple[int, int]]:
    """``shards`` contiguous person ranges of whole chunks, as even as the chunks allow (none empty)."""
    n_chunks = -(-n_persons // chunk)
    shards = max(1, min(shards, n_chunks))
    cuts = [i * n_chunks // shards * chunk for i in range(shards)] + [n_persons]
    return [(cuts[i], min(cuts[i + 1], n_persons)) for i in range(shards)]


def chunk_seed(key: tuple[int, ...], stream: int, chunk: int) -> np.random.Generator:
    """The generator of chunk ``chunk`` in ``stream`` (0: the start; ``s + 1``: sweep ``s``) of one chain."""
    return np.random.default_rng([*key, stream, chunk])


class PersonShard:
    """Persons ``start .. stop - 1`` of a chain: data, latent tastes and the per-person halves of every block."""

    def __init__(self, prob: BlockedProblem, start: int, key: tuple[int, ...], chunk: int = CHUNK):
        """``prob``: the problem restricted to this shard's persons (:func:`restrict`), the first of which is
        person ``start`` of the panel."""
        if start % chunk:
            raise ValueError(f"a shard starts at a chunk boundary (multiple of {chunk}), not at person {start}")
        self.prob = prob
        stop = start + prob.n_persons
        self.start, self.stop, self.key, self.chunk = start, stop, tuple(int(k) for k in key), chunk
        self.bounds = [(a - start, min(a + chunk, stop) - start) for a in range(start, stop, chunk)]
        self.state: BlockedState | None = None
        self.e: np.ndarray | None = None
        self.pending: dict[int, tuple[np.ndarray, tuple[np.ndarray, np.ndarray]]] = {}

    # ------------------------------------------------------------------ helpers
    def _chunks(self, f: Callable[[slice], np.ndarray]) -> np.ndarray:
        """(chunk, ...) sums: ``f`` applied to each chunk's slice of this shard's persons."""
        return np.stack([np.asarray(f(slice(a, b)), dtype=float) for a, b in self.bounds])

    def _noise(self, stream: int, draw: Callable[[np.random.Generator, int], Any]) -> list[Any]:
        first = self.start // self.chunk
        return [draw(chunk_seed(self.key, stream, first + i), b - a) for i, (a, b) in enumerate(self.bounds)]

    def _sync(self, mu_free: np.ndarray, gamma: np.ndarray, L: np.ndarray) -> BlockedState:
        st = self.state
        assert st is not None, "start() the shard first"
        st.mu_free, st.gamma, st.L = mu_free, gamma, L
        return st

    # ------------------------------------------------------------------ start and draws
    def start_chain(self, mu_free: np.ndarray, gamma: np.ndarray, L: np.ndarray) -> None:
        """Persons at their means plus a little noise (per-chunk streams); step sizes 0.5."""
        prob = self.prob
        m = locations(prob, mu_free, gamma)[:, prob.rnd]
        noise = self._noise(0, lambda g, n: g.standard_normal((n, prob.n_random)))
        eta = np.ascontiguousarray(m + 0.1 * np.concatenate(noise) * (0.5 * prob.sd_sd))
        self.state = BlockedState(mu_free=mu_free, gamma=gamma, L=L, eta=eta, h=np.full(prob.n_persons, 0.5))

    def eta(self) -> np.ndarray:
        assert self.state is not None
        return self.state.eta.copy()

    # ------------------------------------------------------------------ persons (MALA)
    def persons(self, mu_free: np.ndarray, gamma: np.ndarray, L: np.ndarray, sweep: int, steps: int,
                adapt_rate: float | None, precondition: str) -> np.ndarray:
        r"""MALA steps on every person of the shard (:func:`update_persons`); (chunk, 2) sums of acceptance and log h."""
        st = self._sync(mu_free, gamma, L)
        prob = self.prob
        r = prob.n_random
        parts = self._noise(sweep + 1, lambda g, n: (g.standard_normal((steps, n, r)), np.log(g.random((steps, n)))))
        xi = np.concatenate([p[0] for p in parts], axis=1)
        log_u = np.concatenate([p[1] for p in parts], axis=1)
        st.sweep = sweep
        accept = update_persons(prob, st, xi, log_u, adapt_rate, precondition)
        return self._chunks(lambda s: [accept[s].sum(), np.log(st.h[s]).sum()])

    # ------------------------------------------------------------------ location
    def location_stats(self) -> np.ndarray:
        r"""(chunk, ...) sums of :math:`\eta_n`, :math:`\eta_n z_n^\top`, :math:`z_n`, :math:`z_n z_n^\top` (flattened)."""
        assert self.state is not None
        eta, Z = self.state.eta, self.prob.Z
        return self._chunks(lambda s: np.concatenate([eta[s].sum(0), (eta[s].T @ Z[s]).ravel(), Z[s].sum(0),
                                                      (Z[s].T @ Z[s]).ravel()]))

    def location_terms(self, mu_free: np.ndarray, gamma: np.ndarray, L: np.ndarray) -> np.ndarray:
        r"""(chunk, ...) sums for the means' full conditional at ``(mu_free, gamma)``: see :func:`location_parts`."""
        st = self.state
        assert st is not None, "start() the shard first"
        st.L = L  # the point (mu_free, gamma) is a proposal: the shard's current means stay as they are
        parts = location_parts(self.prob, st, mu_free, gamma)
        if self.prob.fixed.size:
            st.cache = None  # the fixed coefficients may move
        return self._chunks(lambda s: np.concatenate([[parts[0][s].sum(), parts[1][s].sum()], parts[2][s].sum(0),
                                                      (self.prob.Z[s].T @ parts[3][s]).ravel()]))

    # ------------------------------------------------------------------ covariance
    def scatter(self, mu_free: np.ndarray, gamma: np.ndarray) -> np.ndarray:
        r"""(chunk, r*r) scatter :math:`\sum_n (\eta_n - m_n)(\eta_n - m_n)^\top`."""
        assert self.state is not None
        resid = self.state.eta - locations(self.prob, mu_free, gamma)[:, self.prob.rnd]
        return self._chunks(lambda s: (resid[s].T @ resid[s]).ravel())

    # ------------------------------------------------------------------ interweaving
    def asis_begin(self, mu_free: np.ndarray, gamma: np.ndarray, L: np.ndarray) -> None:
        r"""Fix :math:`e_n = L^{-1}(\eta_n - m_n)` for the interweaving step."""
        st = self._sync(mu_free, gamma, L)
        theta = locations(self.prob, mu_free, gamma)
        self.e = _solve_lower(L, (st.eta - theta[:, self.prob.rnd]).T).T
        self.pending = {}

    def asis_eval(self, L: np.ndarray, mu_free: np.ndarray, metric: bool, use_cache: bool, slot: int) -> np.ndarray:
        """(chunk, ...) sums of the non-centred conditional's terms at ``(L, mu_free)`` (:func:`asis_parts`)."""
        st = self.state
        assert st is not None and self.e is not None
        cached = st.cache if use_cache and not self.prob.fixed.size else None
        eta, lik, parts = asis_parts(self.prob, st.gamma, self.e, L, mu_free, metric, cached)
        self.pending[slot] = (eta, lik)
        return self._chunks(lambda s: np.concatenate([p(s).ravel() for p in parts]))

    def asis_end(self, slot: int, L: np.ndarray, mu_free: np.ndarray) -> None:
        """Take the accepted point ``slot``: its persons' tastes and likelihood cache."""
        st = self.state
        assert st is not None
        st.eta, st.cache = np.ascontiguousarray(self.pending[slot][0]), self.pending[slot][1]
        st.L, st.mu_free = L, mu_free
        self.pending, self.e = {}, None


# --------------------------------------------------------------------------- per-person halves of the blocks


def update_persons(prob: BlockedProblem, state: BlockedState, xi: np.ndarray, log_u: np.ndarray,
                   adapt_rate: float | None, precondition: str) -> np.ndarray:
    r"""MALA on every person's eta (one parallel pass) with the given noise; adapts step sizes while ``adapt_rate``.

    Preconditioner: :math:`\Sigma` (``"population"``), or :math:`(\Sigma^{-1} + \hat F_n)^{-1}`
    (``"information"``) with :math:`\hat F_n` the person's logit information, recomputed at the
    current state every 10 sweeps of warm-up and frozen afterwards, so that in the sampling phase it
    depends only on :math:`\Sigma` (a conditioning variable of this block) and the data.
    ``xi`` (steps, person, random) standard normals, ``log_u`` (steps, person) log-uniforms. Returns the
    persons' acceptance probabilities (mean over the steps).
    """
    beta_fixed = locations(prob, state.mu_free, state.gamma)
    m = np.ascontiguousarray(beta_fixed[:, prob.rnd])
    L = np.ascontiguousarray(state.L)
    Linv = _solve_lower(L, np.eye(prob.n_random))
    Q = Linv.T @ Linv
    if precondition == "information":
        if state.info is None or (adapt_rate is not None and state.sweep % 10 == 0):
            state.info = _person_information_eta(prob, state)
        R = np.linalg.cholesky(Q[None, :, :] + state.info)
    else:
        R = np.broadcast_to(np.linalg.cholesky(Q), (prob.n_persons,) + Q.shape)
    R = np.ascontiguousarray(R)
    accept = np.empty(prob.n_persons)
    loglik = np.empty(prob.n_persons)
    glik = np.empty((prob.n_persons, prob.n_random))
    cache_ll, cache_g = state.cache if state.cache is not None else (loglik, glik)
    mala_persons(prob.data, beta_fixed, state.eta, m, L, R, prob.rnd, prob.logn, prob.sign,
                 state.h, np.ascontiguousarray(xi), np.ascontiguousarray(log_u), state.cache is not None, cache_ll,
                 cache_g, accept, loglik, glik)
    state.cache = (loglik, glik)
    if adapt_rate is not None:  # Robbins-Monro on log h towards the target acceptance, person by person
        state.h *= np.exp(adapt_rate * (accept - MALA_TARGET))
        np.clip(state.h, 1e-4, 5.0, out=state.h)
    return accept


def location_parts(prob: BlockedProblem, state: BlockedState, mu_free: np.ndarray,
                   gamma: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    r"""Per-person pieces of the means' full conditional at ``(mu_free, gamma)``.

    Returns :math:`\lVert L^{-1}(\eta_n - \theta_n)\rVert^2` (person,), the fixed tastes' log-likelihood
    (person,; zeros without fixed tastes), :math:`D_n` (person, attribute) with
    :math:`D_{nk} = [\Sigma^{-1}(\eta_n - \theta_n)]_k` on random and :math:`\partial\ell_n/\partial\beta_{nk}`
    on fixed columns, and :math:`D_n` on the shifted columns (person, shifted).
    """
    theta = locations(prob, mu_free, gamma)
    resid = state.eta - theta[:, prob.rnd]
    y = _solve_lower(state.L, resid.T)
    D = np.zeros_like(theta)
    D[:, prob.rnd] = _solve_lower(state.L, y, trans=1).T
    ll = np.zeros(prob.n_persons)
    if prob.fixed.size:
        beta = theta.copy()
        beta[:, prob.rnd] = np.where(prob.logn, prob.sign * np.exp(np.where(prob.logn, state.eta, 0.0)), state.eta)
        ll, g = person_loglik_grad(prob.data, beta)
        D[:, prob.fixed] = g[:, prob.fixed]
    return np.sum(y * y, axis=0), ll, D, D[:, prob.shifted]


def asis_parts(prob: BlockedProblem, gamma: np.ndarray, e: np.ndarray, L: np.ndarray, mu_free: np.ndarray,
               metric: bool, cached: tuple[np.ndarray, np.ndarray] | None) -> tuple[Any, ...]:
    r"""Per-person pieces of the non-centred conditional of :math:`(L, \tilde\mu)` given ``e`` (see :mod:`.updates`).

    Non-centred: :math:`\eta_n = \theta_{n,R} + L e_n`, :math:`\beta_{nk} = \theta_{nk}` on fixed columns. With
    :math:`\tilde g_n` the gradient of :math:`\ell_n` in :math:`\theta_n` (:math:`J_n\nabla_\beta\ell_n`) and
    :math:`\tilde F_n = J_n F_n J_n` the logit information, returns ``(eta, (loglik, eta-gradient), parts)``
    where ``parts`` are functions of a chunk's slice giving its sums of :math:`\ell_n`,
    :math:`\tilde g_{n,R} e_n^\top`, :math:`\tilde g_n` and, with ``metric``,
    :math:`\sum_n \tilde F_{n,RR} \otimes e_n e_n^\top` (as ``[a, c, b, d]``), :math:`\tilde F_{n,R\cdot}\,e_{nb}`
    (as ``[a, c, b]``) and :math:`\tilde F_n`. ``cached``: the log-likelihoods and eta-gradients at this point
    (no fixed tastes), to skip the likelihood pass.
    """
    r, K = prob.n_random, prob.n_attributes
    theta = locations(prob, mu_free, gamma)
    eta = theta[:, prob.rnd] + e @ L.T
    beta = theta
    beta[:, prob.rnd] = np.where(prob.logn, prob.sign * np.exp(np.where(prob.logn, eta, 0.0)), eta)
    n = e.shape[0]
    J = np.ones((n, K))
    J[:, prob.rnd] = np.where(prob.logn, beta[:, prob.rnd], 1.0)
    Ft = None
    if metric:
        ll, g, F = person_loglik_grad_info(prob.data, beta)
        gt = g * J
        Ft = F * J[:, :, None] * J[:, None, :]
    elif cached is not None:
        ll = cached[0]
        gt = np.zeros((n, K))
        gt[:, prob.rnd] = cached[1]
    else:
        ll, g = person_loglik_grad(prob.data, beta)
        gt = g * J
    gr = np.ascontiguousarray(gt[:, prob.rnd])
    parts: list[Callable[[slice], np.ndarray]] = [
        lambda s: np.atleast_1d(ll[s].sum()), lambda s: gr[s].T @ e[s], lambda s: gt[s].sum(0)]
    if Ft is not None:
        Fr = Ft[:, prob.rnd][:, :, prob.rnd]
        FrK = Ft[:, prob.rnd, :]

        def m4(s: slice) -> np.ndarray:  # [a, c, b, d] = sum_n Fr[n, a, c] e[n, b] e[n, d]
            ee = e[s][:, :, None] * e[s][:, None, :]
            return (Fr[s].reshape(-1, r * r).T @ ee.reshape(-1, r * r)).reshape(r, r, r, r)

        parts += [m4, lambda s: (FrK[s].reshape(-1, r * K).T @ e[s]).reshape(r, K, r), lambda s: Ft[s].sum(0)]
    return eta, (ll, gr), parts


# --------------------------------------------------------------------------- where the shards live


class Shards:
    """Where a chain's shards live: ``call`` runs a method on every shard (in shard order) and returns the results;
    ``reduce`` adds their chunk sums (:func:`add_chunks`); ``gather_eta`` the persons' tastes in panel order."""

    n_persons: int

    def call(self, method: str, *args: Any) -> list[Any]:
        raise NotImplementedError

    def close(self) -> None:
        """Let the shards go (they hold the persons' data)."""

    def reduce(self, method: str, *args: Any) -> np.ndarray:
        return add_chunks(self.call(method, *args))

    def gather_eta(self) -> np.ndarray:
        return np.concatenate(self.call("eta"))


class LocalShards(Shards):
    """Shards in this process (by default one)."""

    def __init__(self, prob: BlockedProblem, key: tuple[int, ...], shards: int = 1, chunk: int = CHUNK):
        self.n_persons = prob.n_persons
        self.shards = [PersonShard(restrict(prob, a, b), a, key, chunk)
                       for a, b in shard_bounds(prob.n_persons, shards, chunk)]

    def call(self, method: str, *args: Any) -> list[Any]:
        return [getattr(s, method)(*args) for s in self.shards]

    def close(self) -> None:
        self.shards = []


def add_chunks(parts: list[np.ndarray]) -> np.ndarray:
    """The sum over every chunk, added in chunk order whatever the shards: (chunk, ...) arrays -> (...)."""
    stacked = np.concatenate(parts, axis=0)
    total = stacked[0].copy()
    for row in stacked[1:]:
        total += row
    return total
