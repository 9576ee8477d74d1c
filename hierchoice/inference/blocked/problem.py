"""The blocked sampler's fixed problem and state: data in the kernels' layout, priors, densities.

May import: :mod:`.kernels`, ``hierchoice.model``, ``hierchoice.data``, ``hierchoice.spec``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numba
import numpy as np

from ...data.panel import ChoicePanel
from ...exceptions import SpecError
from ...model.build import ModelLayout, model_layout, prior_scales
from ...model.likelihood import RaggedDifferences, cell_differences
from ...spec import Spec
from .kernels import person_information, person_loglik

#: ``info["method"]`` of a blocked fit.
METHOD_NAME = "blocked Gibbs (MALA persons)"
#: Target acceptance of per-person MALA (Roberts & Rosenthal 1998, JRSS B 60).
MALA_TARGET = 0.574


@dataclass
class BlockedProblem:
    """Everything that stays fixed across sweeps: the data in the kernels' layout, the priors, the layout."""

    layout: ModelLayout
    data: RaggedDifferences   # the real (task, other alternative) cells, person after person
    Z: np.ndarray             # (person, covariate), standardised as in the model
    rnd: np.ndarray           # (random,) attribute index of each random taste
    fixed: np.ndarray         # (fixed,) attribute index of each fixed taste
    shifted: np.ndarray       # (shifted,) attribute index of each covariate-shifted mean
    logn: np.ndarray          # (random,) bool: lognormal
    sign: np.ndarray          # (random,) sign of each random taste's coefficient
    mean_sd: np.ndarray       # (attribute,) prior SD of the population means mu (mu_std mapped by the centring)
    sd_sd: np.ndarray         # (random,) HalfNormal scale of the SDs
    gamma_sd: float
    lkj_eta: float
    centre: np.ndarray | None  # (attribute, attribute) constant centring, or None
    lin: np.ndarray           # (attribute,) bool: mean coefficient linear in mu_std (normal / fixed)
    coef_sign: np.ndarray     # (attribute,) sign of each attribute's coefficient
    conjugate: bool           # exact normal draw of the location block

    @property
    def n_persons(self) -> int:
        return self.data.n_persons

    @property
    def n_attributes(self) -> int:
        return self.data.n_attributes

    @property
    def n_random(self) -> int:
        return int(self.rnd.size)

    @property
    def n_covariates(self) -> int:
        return int(self.Z.shape[1])


@dataclass
class BlockedState:
    """Persons' state (of a shard, or of the whole panel) with the population values it was last given.

    ``mu_free`` (attribute,) ``mu_std``; ``gamma`` (covariate, shifted) ``gamma_std``; ``L`` (random, random) the
    lower Cholesky factor of Sigma (diagonal when independent); ``eta`` (person, random) ``eta_std``; ``h``
    (person,) MALA step sizes.
    """

    mu_free: np.ndarray
    gamma: np.ndarray
    L: np.ndarray
    eta: np.ndarray
    h: np.ndarray
    info: np.ndarray | None = None        # (person, random, random) frozen logit information (preconditioner)
    # (log-likelihood (person,), its eta-gradient (person, random)) at the current eta and fixed coefficients
    cache: tuple[np.ndarray, np.ndarray] | None = None
    sweep: int = 0


@dataclass
class PopulationState:
    """The population's free variables (internal scale) and the adaptation state of the population blocks."""

    mu_free: np.ndarray       # (attribute,) mu_std
    gamma: np.ndarray         # (covariate, shifted) gamma_std
    L: np.ndarray             # (random, random) lower Cholesky factor of Sigma
    loc_scale: float = 0.5
    loc_cov: np.ndarray | None = None
    asis_scale: float = 0.5
    asis_metric: np.ndarray | None = None  # the interweaving step's metric, frozen after warm-up
    sweep: int = 0
    stats: dict[str, float] = field(default_factory=dict)


def _refuse(layout: ModelLayout, spec: Spec) -> None:
    """Raise :class:`SpecError` naming any feature the blocked sampler does not support."""
    if layout.wtp_space:
        raise SpecError("method='blocked' does not support willingness-to-pay space (model.wtp_space = true); "
                        "fit it with method='nuts', or set model.wtp_space = false.")
    if not layout.random:
        raise SpecError("method='blocked' needs at least one random (normal or lognormal) taste; with only fixed "
                        "tastes fit with method='nuts'.")


def blocked_problem(panel: ChoicePanel, spec: Spec) -> BlockedProblem:
    """Lay out ``panel`` under ``spec`` for the blocked sampler (same scaling and priors as :func:`build_model`)."""
    panel = panel.with_spec(spec)
    layout = model_layout(panel, spec)
    _refuse(layout, spec)
    data = cell_differences(panel.cells, scale=layout.scale)
    n_k = len(layout.terms)
    rnd = np.array(layout.random, dtype=np.int64)
    priors = prior_scales(layout, spec.model.prior_scale)  # the same priors as build_model, from the same function
    if layout.shifted:
        Z = np.ascontiguousarray((panel.Z - layout.z_mean) / layout.z_scale, dtype=float)
    else:
        Z = np.zeros((panel.n_persons, 0))
    lognormal = np.array([layout.is_lognormal(k) for k in range(n_k)])
    centre = layout.constant_centre
    lin = ~lognormal
    linear_map = centre is None or not np.any(centre[:, lognormal])
    return BlockedProblem(
        layout=layout, data=data, Z=Z, rnd=rnd,
        fixed=np.array(layout.fixed, dtype=np.int64), shifted=np.array(layout.shifted, dtype=np.int64),
        logn=lognormal[rnd], sign=np.array([layout.sign(k) for k in layout.random]),
        mean_sd=priors.mean_sd, sd_sd=priors.sd_sd,
        gamma_sd=priors.covariate_sd, lkj_eta=priors.lkj_eta, centre=centre, lin=lin,
        coef_sign=np.array([layout.sign(k) for k in range(n_k)]),
        conjugate=not layout.fixed and linear_map,
    )


# --------------------------------------------------------------------------- the model's pieces (numpy)


def population_means(prob: BlockedProblem, mu_free: np.ndarray) -> np.ndarray:
    r"""The attributes' population means :math:`\mu` from the free ``mu_std`` (constant centring of the model).

    .. math:: \mu = \tilde\mu - C\,\bar\beta(\tilde\mu), \qquad
              \bar\beta_k = s_k e^{\tilde\mu_k} \text{ (lognormal) or } \tilde\mu_k,

    as :func:`hierchoice.model.build._centred_constants`.
    """
    if prob.centre is None:
        return mu_free
    coef = np.where(prob.lin, mu_free, prob.coef_sign * np.exp(np.where(prob.lin, 0.0, mu_free)))
    return mu_free - prob.centre @ coef


def _shift(prob: BlockedProblem, gamma: np.ndarray) -> np.ndarray:
    """(person, attribute) covariate shifts of the means (zeros off the shifted columns)."""
    out = np.zeros((prob.n_persons, prob.n_attributes))
    if prob.shifted.size:
        out[:, prob.shifted] = prob.Z @ gamma
    return out


def locations(prob: BlockedProblem, mu_free: np.ndarray, gamma: np.ndarray) -> np.ndarray:
    """(person, attribute) locations :math:`\\mu + \\Gamma^\\top z_n` of every attribute."""
    return population_means(prob, mu_free)[None, :] + _shift(prob, gamma)


def person_betas(prob: BlockedProblem, state: BlockedState) -> np.ndarray:
    """(person, attribute) coefficients on the internal scale: fixed columns from the locations, random from eta."""
    beta = locations(prob, state.mu_free, state.gamma)
    eta = state.eta
    beta[:, prob.rnd] = np.where(prob.logn, prob.sign * np.exp(np.where(prob.logn, eta, 0.0)), eta)
    return beta


def chol_log_prior(prob: BlockedProblem, L: np.ndarray) -> float:
    r"""Log prior density of the Cholesky factor ``L`` as PyMC's ``LKJCholeskyCov`` defines it (up to a constant).

    With :math:`\sigma_i = \lVert L_{i\cdot}\rVert` and :math:`w_i = L_{ii}/\sigma_i` (the diagonal of
    the correlation's Cholesky factor), the density on the :math:`n(n+1)/2` entries of ``L`` is

    .. math:: \prod_i \mathrm{HalfNormal}(\sigma_i; s_i)\;\prod_i w_i^{\,n - i + 2\eta - 3}
              \;\prod_i \frac{w_i}{\sigma_i^{\,i}} \qquad (i = 0, \dots, n-1),

    the LKJ density of the correlation's Cholesky factor (Lewandowski, Kurowicka & Joe
    2009, JMA 100; written in this form in the Stan reference manual, "Cholesky LKJ
    correlation distribution") times the Jacobian of
    :math:`(\sigma, w) \mapsto L = \mathrm{diag}(\sigma)\,W`.
    """
    n = L.shape[0]
    sd = np.sqrt(np.sum(L * L, axis=1))
    w = np.diag(L) / sd
    if np.any(w <= 0) or np.any(sd <= 0):
        return -np.inf
    i = np.arange(n)
    lp_sd = float(np.sum(-0.5 * (sd / prob.sd_sd) ** 2 - np.log(prob.sd_sd)))
    lp_lkj = float(np.sum((2 * prob.lkj_eta - 3 + n - i) * np.log(w)))
    jac = float(np.sum(np.log(w) - i * np.log(sd)))
    return lp_sd + lp_lkj + jac


def _sd_log_prior(prob: BlockedProblem, sd: np.ndarray) -> float:
    """HalfNormal log density of independent SDs (up to a constant)."""
    if np.any(sd <= 0):
        return -np.inf
    return float(np.sum(-0.5 * (sd / prob.sd_sd) ** 2))


def _cov_log_prior(prob: BlockedProblem, L: np.ndarray) -> float:
    return chol_log_prior(prob, L) if prob.layout.correlated else _sd_log_prior(prob, np.diag(L))


def _location_log_prior(prob: BlockedProblem, mu_free: np.ndarray, gamma: np.ndarray) -> float:
    r"""Log prior of the free means and covariate effects (up to a constant), as :func:`hierchoice.model._free_means`.

    The normal prior sits on the population means :math:`\mu(\tilde\mu)` (the reported constants, not
    their centred free parameters); the centring's Jacobian is unit triangular, so no Jacobian term.
    """
    mu = population_means(prob, mu_free)
    return float(-0.5 * np.sum((mu / prob.mean_sd) ** 2) - 0.5 * np.sum(gamma**2) / prob.gamma_sd**2)


def _eta_log_density(L: np.ndarray, resid: np.ndarray) -> float:
    """Sum over persons of log N(eta_n; m_n, L L^T) (up to the 2 pi constant), ``resid = eta - m``."""
    y = _solve_lower(L, resid.T)
    return float(-0.5 * np.sum(y * y) - resid.shape[0] * np.sum(np.log(np.diag(L))))


def _solve_lower(L: np.ndarray, B: np.ndarray, trans: int = 0) -> np.ndarray:
    """``L^-1 B`` (``trans=1``: ``L^-T B``) for lower-triangular ``L`` (random x random) and ``B`` (random, ...).

    Substitution in a compiled loop, not LAPACK: ``L`` is a few tastes across, and the population blocks call this
    hundreds of times a sweep, where a library call's fixed cost (argument checks, waking BLAS threads on a busy
    machine) was most of a sweep.
    """
    B = np.asarray(B, dtype=float)
    flat = np.ascontiguousarray(B.reshape(B.shape[0], -1))
    out = _substitute(np.ascontiguousarray(L, dtype=float), flat, trans == 1)
    return out.reshape(B.shape)


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _substitute(L: np.ndarray, B: np.ndarray, transposed: bool) -> np.ndarray:  # pragma: no cover - compiled
    n, m = B.shape
    X = np.empty((n, m))
    if not transposed:  # forward: L X = B
        for i in range(n):
            for c in range(m):
                acc = B[i, c]
                for j in range(i):
                    acc -= L[i, j] * X[j, c]
                X[i, c] = acc / L[i, i]
    else:  # backward: L^T X = B
        for i in range(n - 1, -1, -1):
            for c in range(m):
                acc = B[i, c]
                for j in range(i + 1, n):
                    acc -= L[j, i] * X[j, c]
                X[i, c] = acc / L[i, i]
    return X


def log_density(prob: BlockedProblem, state: BlockedState) -> float:
    """The log posterior of the centred model at ``state`` (up to a constant): the sum of the blocks' terms.

    Prior of the means and covariate effects, prior of the covariance, the persons'
    normal density and the panel log-likelihood. Tested against the PyMC model's
    ``compile_logp`` in ``tests/test_blocked.py``.
    """
    theta = locations(prob, state.mu_free, state.gamma)
    resid = state.eta - theta[:, prob.rnd]
    beta = person_betas(prob, state)
    ll = float(person_loglik(prob.data, beta).sum())
    return (_location_log_prior(prob, state.mu_free, state.gamma) + _cov_log_prior(prob, state.L)
            + _eta_log_density(state.L, resid) + ll)


# --------------------------------------------------------------------------- the blocks


def _person_information_eta(prob: BlockedProblem, state: BlockedState) -> np.ndarray:
    r"""(person, random, random) logit information of each person in eta: :math:`J F_n J` on the random columns.

    :math:`J = \mathrm{diag}(\partial\beta_k/\partial\eta_k)` (``beta_k`` for lognormal, 1 for normal);
    the curvature of :math:`s e^{\eta}` itself is left out: this is only a preconditioner.
    """
    beta = person_betas(prob, state)
    F = person_information(prob.data, beta)[:, prob.rnd][:, :, prob.rnd]
    J = np.where(prob.logn[None, :], beta[:, prob.rnd], 1.0)
    return F * J[:, :, None] * J[:, None, :]


