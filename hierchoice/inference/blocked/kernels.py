r"""Numba kernels of the blocked sampler: per-person panel logit log-likelihoods and a per-person MALA pass.

The data are the real cells of :class:`hierchoice.model.likelihood.RaggedDifferences`: ``D[c, k]`` for cell ``c``
(a task's non-chosen available alternative), the cells of task ``t`` at ``task_ptr[t]:task_ptr[t + 1]`` and the
tasks of person ``n`` at ``person_ptr[n]:person_ptr[n + 1]``, so nothing is padded. For person :math:`n` with tastes
:math:`\beta_n`

.. math::

    \ell_n(\beta_n) = -\sum_t \Big[m_{nt} + \log\Big(e^{-m_{nt}} + \sum_j a_{ntj} e^{\Delta_{ntj} - m_{nt}}\Big)\Big],
    \qquad \frac{\partial \ell_n}{\partial \beta_{nk}} = -\sum_t \sum_j q_{ntj} d_{ntjk},

with :math:`\Delta_{ntj} = d_{ntj}\cdot\beta_n`, :math:`m_{nt} = \max(0, \max_j \Delta_{ntj})`
and :math:`q_{ntj}` the logit probability of the non-chosen alternative (McFadden 1974;
Train 2009, eq. 3.9): the same stable formula as :func:`hierchoice.model.logit_op.loglik_and_grad`,
summed per person instead of over the panel, so persons can be updated independently
and in parallel (``numba.prange``). Random numbers are drawn by the caller, so results
do not depend on the number of threads.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from ...model.likelihood import RaggedDifferences

#: Persons are processed in this many chunks (each thread takes whole chunks; scratch arrays once per chunk).
CHUNKS = 64

__all__ = ["mala_persons", "person_information", "person_loglik", "person_loglik_grad", "person_loglik_grad_info"]


@numba.njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _task_weights(Dn, r0, n_o, beta, delta):  # type: ignore[no-untyped-def]
    r"""One task (cells ``r0 .. r0 + n_o``): fill ``delta`` with the non-chosen alternatives' weights
    :math:`e^{\Delta_{ntj} - m}` and return ``(m, s)``, so the task's log-likelihood is
    :math:`-(m + \log s)` and the probability of alternative ``j`` is ``delta[j] / s``."""
    m = 0.0
    for j in range(n_o):
        d = 0.0
        for k in range(Dn.shape[1]):
            d += Dn[r0 + j, k] * beta[k]
        delta[j] = d
        m = max(m, d)
    s = 1.0 if m == 0.0 else math.exp(-m)
    for j in range(n_o):
        e = math.exp(delta[j] - m)
        delta[j] = e
        s += e
    return m, s


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _eval_person(D, tptr, t0, t1, beta, g, delta):  # type: ignore[no-untyped-def]
    """Log-likelihood of one person (tasks ``t0 .. t1``) and its gradient into ``g``."""
    n_k = D.shape[1]
    for k in range(n_k):
        g[k] = 0.0
    ll = 0.0
    for t in range(t0, t1):
        r0 = tptr[t]
        n_o = tptr[t + 1] - r0
        m, s = _task_weights(D, r0, n_o, beta, delta)
        ll -= m + math.log(s)
        inv = 1.0 / s
        for j in range(n_o):
            q = delta[j] * inv
            if q != 0.0:
                for k in range(n_k):
                    g[k] -= q * D[r0 + j, k]
    return ll


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _eval_person_value(D, tptr, t0, t1, beta, delta):  # type: ignore[no-untyped-def]
    """Log-likelihood of one person, without the gradient."""
    ll = 0.0
    for t in range(t0, t1):
        r0 = tptr[t]
        m, s = _task_weights(D, r0, tptr[t + 1] - r0, beta, delta)
        ll -= m + math.log(s)
    return ll


def _person_loglik(D, tptr, pptr, n_o, beta):  # type: ignore[no-untyped-def]
    """Per-person log-likelihoods, shape (person,), of tastes ``beta`` (person, attribute)."""
    n_p = pptr.size - 1
    out = np.empty(n_p)
    n_chunks = min(n_p, CHUNKS)
    for c in numba.prange(n_chunks):
        delta = np.empty(n_o)
        for n in range(c * n_p // n_chunks, (c + 1) * n_p // n_chunks):
            out[n] = _eval_person_value(D, tptr, pptr[n], pptr[n + 1], beta[n], delta)
    return out


def _person_loglik_grad(D, tptr, pptr, n_o, beta):  # type: ignore[no-untyped-def]
    """Per-person log-likelihoods (person,) and their gradients (person, attribute) w.r.t. ``beta``."""
    n_p, n_k = pptr.size - 1, D.shape[1]
    out = np.empty(n_p)
    grad = np.empty((n_p, n_k))
    n_chunks = min(n_p, CHUNKS)
    for c in numba.prange(n_chunks):
        delta = np.empty(n_o)
        for n in range(c * n_p // n_chunks, (c + 1) * n_p // n_chunks):
            out[n] = _eval_person(D, tptr, pptr[n], pptr[n + 1], beta[n], grad[n], delta)
    return out, grad


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _fill_beta(beta, eta_n, rnd, logn, sign):  # type: ignore[no-untyped-def]
    for a in range(rnd.size):
        beta[rnd[a]] = sign[a] * math.exp(eta_n[a]) if logn[a] else eta_n[a]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _lik_eta(D, tptr, t0, t1, beta, eta_n, rnd, logn, sign, g, delta, glik):  # type: ignore[no-untyped-def]
    r"""Person log-likelihood at latent tastes ``eta_n`` and its gradient in eta (into ``glik``).

    :math:`\beta_k = s_k e^{\eta_k}` (lognormal) or :math:`\eta_k` (normal) on the random columns, so
    :math:`\partial\ell/\partial\eta_k = \beta_k\,\partial\ell/\partial\beta_k` or
    :math:`\partial\ell/\partial\beta_k`.
    """
    _fill_beta(beta, eta_n, rnd, logn, sign)
    ll = _eval_person(D, tptr, t0, t1, beta, g, delta)
    for a in range(rnd.size):
        glik[a] = g[rnd[a]] * (beta[rnd[a]] if logn[a] else 1.0)
    return ll


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _prior_eta(eta_n, m_n, L, y, grad, glik):  # type: ignore[no-untyped-def]
    r"""``-||L^{-1}(eta - m)||^2 / 2``; ``grad = glik - Sigma^{-1}(eta - m)``."""
    n_r = eta_n.size
    for a in range(n_r):  # forward substitution L y = eta - m
        acc = eta_n[a] - m_n[a]
        for b in range(a):
            acc -= L[a, b] * y[b]
        y[a] = acc / L[a, a]
    quad = 0.0
    for a in range(n_r):
        quad += y[a] * y[a]
    for a in range(n_r - 1, -1, -1):  # back substitution L^T x = y, x = Sigma^-1 (eta - m), into grad
        acc = y[a]
        for b in range(a + 1, n_r):
            acc -= L[b, a] * grad[b]
        grad[a] = acc / L[a, a]
    for a in range(n_r):
        grad[a] = glik[a] - grad[a]
    return -0.5 * quad


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _log_target(D, tptr, t0, t1, beta, eta_n, m_n, L, rnd, logn, sign, g, delta, y, grad):  # type: ignore[no-untyped-def]
    r"""Log conditional density of one person's latent tastes and its gradient (into ``grad``).

    .. math:: \log\pi(\eta) = -\tfrac12 \lVert L^{-1}(\eta - m)\rVert^2 + \ell_n(\beta(\eta)), \qquad
              \nabla\log\pi = -L^{-\top}L^{-1}(\eta - m) + J^\top \nabla_\beta \ell_n,

    with :math:`J = \partial\beta/\partial\eta` diagonal (:math:`\beta_k` for lognormal, 1 for
    normal columns). Returns ``(log pi, loglik)``.
    """
    glik = np.empty(rnd.size)
    ll = _lik_eta(D, tptr, t0, t1, beta, eta_n, rnd, logn, sign, g, delta, glik)
    return ll + _prior_eta(eta_n, m_n, L, y, grad, glik), ll


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _drift(eta_n, R, grad, h, out):  # type: ignore[no-untyped-def]
    r"""``out = eta + h^2/2 * M grad`` with the preconditioner :math:`M = (RR^\top)^{-1}` (``R`` lower triangular)."""
    n_r = eta_n.size
    for a in range(n_r):  # R z = grad
        acc = grad[a]
        for b in range(a):
            acc -= R[a, b] * out[b]
        out[a] = acc / R[a, a]
    for a in range(n_r - 1, -1, -1):  # R^T x = z
        acc = out[a]
        for b in range(a + 1, n_r):
            acc -= R[b, a] * out[b]
        out[a] = acc / R[a, a]
    half = 0.5 * h * h
    for a in range(n_r):
        out[a] = eta_n[a] + half * out[a]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _log_q(to, mean, R, h):  # type: ignore[no-untyped-def]
    r"""``-||R^T (to - mean)||^2 / (2 h^2)``: the proposal density :math:`N(\text{mean}, h^2 M)` up to a shared constant."""
    n_r = to.size
    quad = 0.0
    for a in range(n_r):
        acc = 0.0
        for b in range(a, n_r):
            acc += R[b, a] * (to[b] - mean[b])
        quad += acc * acc
    return -0.5 * quad / (h * h)


def _mala_persons(D, tptr, pptr, n_o, beta_fixed, eta, m, L, R, rnd, logn, sign, h, xi, log_u, use_cache, cache_ll,
                  cache_g, accept, loglik, glik_out):  # type: ignore[no-untyped-def]
    r"""Preconditioned MALA steps on every person's latent tastes, in place; parallel over persons.

    For person :math:`n` the target is its full conditional
    :math:`\pi(\eta_n) \propto N(\eta_n; m_n, \Sigma)\, e^{\ell_n(\beta(\eta_n))}` and the
    proposal (Roberts & Tweedie 1996; Roberts & Rosenthal 1998) is

    .. math:: \eta' = \eta + \tfrac{h_n^2}{2}\,M_n\nabla\log\pi(\eta) + h_n R_n^{-\top}\xi,
              \qquad M_n = (R_nR_n^\top)^{-1},\ \xi \sim N(0, I),

    accepted with the Metropolis–Hastings probability. ``R_n`` may be the Cholesky
    factor of :math:`\Sigma^{-1}` (preconditioning by the population covariance) or of
    :math:`\Sigma^{-1} + \hat F_n` (adding the person's logit information at a fixed
    point): any preconditioner that does not depend on :math:`\eta_n` keeps the
    conditional invariant.

    Parameters
    ----------
    D, tptr, pptr, n_o : the cells, task and person pointers, and the most non-chosen alternatives of a task
    beta_fixed : (person, attribute) coefficients of the fixed columns (random columns are overwritten)
    eta : (person, random) latent tastes, updated in place
    m : (person, random) their population means
    L : (random, random) lower Cholesky factor of the population covariance
    R : (person, random, random) lower Cholesky factors of the preconditioners' inverses
    rnd : (random,) attribute index of each random column; ``logn``/``sign``: lognormal flag and sign
    h : (person,) step sizes
    xi : (steps, person, random) standard normals; ``log_u`` (steps, person) log-uniforms
    use_cache, cache_ll, cache_g : when ``use_cache``, the log-likelihoods (person,) and their eta-gradients
        (person, random) at the current ``eta``, which are then not recomputed
    accept : (person,) output, the mean acceptance probability over the steps
    loglik, glik_out : (person,) and (person, random) outputs, the log-likelihood and its eta-gradient at the
        final state (the next pass's cache)
    """
    n_p, n_k = pptr.size - 1, D.shape[1]
    n_r = rnd.size
    n_steps = xi.shape[0]
    n_chunks = min(n_p, CHUNKS)
    for c in numba.prange(n_chunks):  # scratch arrays once per chunk of persons, not once per person
        beta = np.empty(n_k)
        g = np.empty(n_k)
        delta = np.empty(n_o)
        y = np.empty(n_r)
        grad = np.empty(n_r)
        grad_p = np.empty(n_r)
        glik = np.empty(n_r)
        glik_p = np.empty(n_r)
        prop = np.empty(n_r)
        mean_f = np.empty(n_r)
        mean_b = np.empty(n_r)
        cur = np.empty(n_r)
        for n in range(c * n_p // n_chunks, (c + 1) * n_p // n_chunks):
            for k in range(n_k):
                beta[k] = beta_fixed[n, k]
            for a in range(n_r):
                cur[a] = eta[n, a]
            Rn = R[n]
            if use_cache:
                ll = cache_ll[n]
                for a in range(n_r):
                    glik[a] = cache_g[n, a]
            else:
                ll = _lik_eta(D, tptr, pptr[n], pptr[n + 1], beta, cur, rnd, logn, sign, g, delta, glik)
            lp = ll + _prior_eta(cur, m[n], L, y, grad, glik)
            hn = h[n]
            acc_sum = 0.0
            for s in range(n_steps):
                _drift(cur, Rn, grad, hn, mean_f)
                for a in range(n_r - 1, -1, -1):  # noise R^-T xi by back substitution
                    acc = xi[s, n, a]
                    for b in range(a + 1, n_r):
                        acc -= Rn[b, a] * y[b]
                    y[a] = acc / Rn[a, a]
                for a in range(n_r):
                    prop[a] = mean_f[a] + hn * y[a]
                ll_p = _lik_eta(D, tptr, pptr[n], pptr[n + 1], beta, prop, rnd, logn, sign, g, delta, glik_p)
                lp_p = ll_p + _prior_eta(prop, m[n], L, y, grad_p, glik_p)
                _drift(prop, Rn, grad_p, hn, mean_b)
                log_a = lp_p - lp + _log_q(cur, mean_b, Rn, hn) - _log_q(prop, mean_f, Rn, hn)
                a_prob = 1.0 if log_a >= 0.0 else (0.0 if math.isnan(log_a) else math.exp(log_a))
                acc_sum += a_prob
                if log_u[s, n] < log_a:
                    for a in range(n_r):
                        cur[a] = prop[a]
                        grad[a] = grad_p[a]
                        glik[a] = glik_p[a]
                    lp = lp_p
                    ll = ll_p
            for a in range(n_r):
                eta[n, a] = cur[a]
            accept[n] = acc_sum / n_steps
            loglik[n] = ll
            for a in range(n_r):
                glik_out[n, a] = glik[a]


def _person_loglik_grad_info(D, tptr, pptr, n_o, beta):  # type: ignore[no-untyped-def]
    r"""Per-person log-likelihoods (person,), gradients (person, attribute) and Fisher information.

    The information, shape (person, attribute, attribute), is

    .. math:: F_n = \sum_t \Big[\sum_j q_{ntj} d_{ntj} d_{ntj}^\top - g_{nt} g_{nt}^\top\Big],
              \qquad g_{nt} = \sum_j q_{ntj} d_{ntj},

    the covariance of the attribute differences under the choice probabilities: the
    negative Hessian of the logit log-likelihood (Train 2009, ch. 3.7, in differences).
    """
    n_p, n_k = pptr.size - 1, D.shape[1]
    ll = np.empty(n_p)
    grad = np.zeros((n_p, n_k))
    out = np.zeros((n_p, n_k, n_k))
    for n in numba.prange(n_p):
        b = beta[n]
        delta = np.empty(n_o)
        gt = np.empty(n_k)
        F = out[n]
        total = 0.0
        for t in range(pptr[n], pptr[n + 1]):
            r0 = tptr[t]
            n_ot = tptr[t + 1] - r0
            mx, s = _task_weights(D, r0, n_ot, b, delta)
            total -= mx + math.log(s)
            for k in range(n_k):
                gt[k] = 0.0
            for j in range(n_ot):
                q = delta[j] / s
                if q != 0.0:
                    for k in range(n_k):
                        gt[k] += q * D[r0 + j, k]
                        for l in range(k + 1):
                            F[k, l] += q * D[r0 + j, k] * D[r0 + j, l]
            for k in range(n_k):
                grad[n, k] -= gt[k]
                for l in range(k + 1):
                    F[k, l] -= gt[k] * gt[l]
        ll[n] = total
        for k in range(n_k):
            for l in range(k):
                F[l, k] = F[k, l]
    return ll, grad, out

#: Below this many real (task, other alternative) cells the kernels run on one thread: launching threads costs more
#: than it saves on small panels, and far more on a machine whose cores are busy.
PARALLEL_MIN_ROWS = 50_000


def _compiled(f):  # type: ignore[no-untyped-def]
    """A (parallel, serial) pair of compiled versions of ``f`` (prange is range in the serial one)."""
    opts = {"cache": True, "nogil": True, "error_model": "numpy"}
    return numba.njit(parallel=True, **opts)(f), numba.njit(parallel=False, **opts)(f)


_LOGLIK = _compiled(_person_loglik)
_LOGLIK_GRAD = _compiled(_person_loglik_grad)
_MALA = _compiled(_mala_persons)
_ALL = _compiled(_person_loglik_grad_info)


def _args(data: RaggedDifferences) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    return data.D, data.task_ptr, data.person_ptr, max(data.max_others, 1)


def _pick(pair, data: RaggedDifferences):  # type: ignore[no-untyped-def]
    return pair[0] if data.n_cells >= PARALLEL_MIN_ROWS else pair[1]


def person_loglik(data: RaggedDifferences, beta: np.ndarray) -> np.ndarray:
    """Per-person log-likelihoods, shape (person,), of tastes ``beta`` (person, attribute)."""
    return _pick(_LOGLIK, data)(*_args(data), np.ascontiguousarray(beta))


def person_loglik_grad(data: RaggedDifferences, beta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-person log-likelihoods (person,) and their gradients (person, attribute) w.r.t. ``beta``."""
    return _pick(_LOGLIK_GRAD, data)(*_args(data), np.ascontiguousarray(beta))


def mala_persons(data: RaggedDifferences, beta_fixed, eta, m, L, R, rnd, logn, sign, h, xi, log_u,  # type: ignore[no-untyped-def]
                 use_cache, cache_ll, cache_g, accept, loglik, glik_out):
    """Preconditioned MALA steps on every person's latent tastes, in place (see :func:`_mala_persons`)."""
    _pick(_MALA, data)(*_args(data), beta_fixed, eta, m, L, R, rnd, logn, sign, h, xi, log_u, use_cache, cache_ll,
                       cache_g, accept, loglik, glik_out)


def person_loglik_grad_info(data: RaggedDifferences, beta: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-person log-likelihoods, gradients and logit information (see :func:`_person_loglik_grad_info`)."""
    return _pick(_ALL, data)(*_args(data), np.ascontiguousarray(beta))


def person_information(data: RaggedDifferences, beta: np.ndarray) -> np.ndarray:
    """Per-person logit Fisher information (person, attribute, attribute)."""
    return person_loglik_grad_info(data, beta)[2]
