r"""The model builder: a validated panel and a spec become a PyMC panel mixed logit.

For person :math:`n`, task :math:`t`, alternative :math:`j`, utility is
:math:`U_{ntj} = x_{ntj}\cdot\beta_n + \varepsilon_{ntj}` with i.i.d. Gumbel errors,
and :math:`\beta_n` is constant across the person's tasks. Each attribute's taste is

* ``fixed``: :math:`\beta_{nk} = \mu_k + \gamma_k^\top z_n` (the same for everyone
  up to covariates);
* ``normal``: :math:`\beta_{nk} = \mu_k + \gamma_k^\top z_n + \sigma_k e_{nk}`;
* ``lognormal``: :math:`\beta_{nk} = s_k \exp(\eta_{nk})` with
  :math:`\eta_{nk} = \mu_k + \gamma_k^\top z_n + \sigma_k e_{nk}` and sign :math:`s_k`;

with :math:`e_n \sim N(0, I)` (independent tastes) or :math:`e_n \sim N(0, \Omega)`
where :math:`\Omega` is a correlation matrix with an LKJ prior (correlated tastes;
Lewandowski, Kurowicka & Joe 2009). In willingness-to-pay space (Train & Weeks
2005) the price coefficient is :math:`-\lambda_n` with :math:`\lambda_n` lognormal
and every other coefficient is :math:`\lambda_n w_{nk}`, so the :math:`w_{nk}`
(willingness to pay) are what the population distribution describes.

Internally every numeric attribute is divided by its standard deviation over the
available alternatives and every covariate is centred and scaled, so one set of
weakly-informative priors fits any units; all reported quantities
(``taste_mean``, ``taste_sd``, ``taste_corr``, ``covariate_effect``,
``person_taste``, ``person_wtp``) are in the user's units. With covariates,
``taste_mean`` is the population mean at the sample-average covariate values.
See ``docs/model.md`` for the priors.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from .._backend import load_backend
from ..data.panel import ChoicePanel, Term
from ..exceptions import SpecError
from ..spec import Spec, load_spec
from .likelihood import RaggedDifferences, cell_differences, difference_data, task_loglik_graph
from .transforms import TasteMap, latent_to_coefficient

__all__ = ["ModelLayout", "model_layout", "build_model", "POPULATION_VARS", "PRIOR_SD", "PriorScales", "prior_scales",
           "implied_priors"]

#: Posterior variables that describe the population (the ones convergence checks must pass on).
POPULATION_VARS = ("taste_mean", "taste_sd", "taste_corr", "covariate_effect")

#: Prior scales on the internal (standardised) scale; each is multiplied by model.prior_scale.
PRIOR_SD = {
    "mean": 2.5,          # Normal(0, 2.5) on a standardised coefficient (common practice for logit slopes)
    "log_mean": 1.0,      # Normal(0, 1) on the log of a standardised lognormal coefficient
    "sd": 1.0,            # HalfNormal(1) on the SD of a standardised normal taste
    "constant_sd": 5.0,   # HalfNormal(5) on the SD of a normal constant, on the logit scale (docs/model.md)
    "log_sd": 0.5,        # HalfNormal(0.5) on the SD of the log of a lognormal taste
    "covariate": 1.0,     # Normal(0, 1) per standardised covariate
    "lkj_eta": 2.0,       # LKJ(2): mild shrinkage of correlations towards 0
}

_UNIT_KINDS = ("dummy", "effects", "constant", "lagged_choice")

#: Probability of the implied prior intervals of :func:`implied_priors`.
PRIOR_INTERVAL = 0.90


@dataclass(frozen=True)
class ModelLayout:
    """Where each attribute goes in the model, and the internal scaling.

    ``scale[k]`` divides attribute ``k`` internally (1 for 0/1-coded columns);
    ``random`` / ``fixed`` index the attributes by taste kind; ``shifted`` the
    attributes whose means depend on covariates; ``price`` the price attribute
    in willingness-to-pay space.
    """

    terms: tuple[Term, ...]
    scale: np.ndarray
    random: tuple[int, ...]
    fixed: tuple[int, ...]
    shifted: tuple[int, ...]
    z_mean: np.ndarray
    z_scale: np.ndarray
    covariates: tuple[str, ...]
    correlated: bool
    centred: bool
    wtp_space: bool
    price: int | None
    constant_centre: np.ndarray | None = None

    @property
    def names(self) -> list[str]:
        return [t.name for t in self.terms]

    @property
    def random_names(self) -> list[str]:
        return [self.terms[k].name for k in self.random]

    @property
    def shifted_names(self) -> list[str]:
        return [self.terms[k].name for k in self.shifted]

    @property
    def taste_map(self) -> TasteMap:
        """Which attributes are lognormal, their signs, and the price column in WTP space."""
        return TasteMap.of([t.taste for t in self.terms], [self.sign(k) for k in range(len(self.terms))],
                           self.price if self.wtp_space else None)

    def is_lognormal(self, k: int) -> bool:
        return self.terms[k].taste == "lognormal"

    def sign(self, k: int) -> float:
        return -1.0 if self.terms[k].sign == "negative" else 1.0

    def unit_factor(self, k: int) -> float:
        """Multiply an internal (standardised) linear taste by this to get the user's units.

        In preference space the coefficient of ``x/s`` is ``beta*s``, so the factor is
        ``1/s``. In WTP space a willingness to pay ``w~`` per standardised unit is
        ``w~ * s_price / s_k`` in the user's units.
        """
        if self.wtp_space and self.price is not None and k != self.price:
            return float(self.scale[self.price] / self.scale[k])
        return float(1.0 / self.scale[k])

    def log_shift(self, k: int) -> float:
        """Add this to an internal log-taste (lognormal) to get the user's units."""
        return float(np.log(self.unit_factor(k)))

    def to_dict(self) -> dict[str, Any]:
        return {
            "attributes": self.names,
            "scale": self.scale.tolist(),
            "random": self.random_names,
            "shifted": self.shifted_names,
            "covariates": list(self.covariates),
            "z_mean": self.z_mean.tolist(),
            "z_scale": self.z_scale.tolist(),
            "correlated": self.correlated,
            "centred": self.centred,
            "wtp_space": self.wtp_space,
            "price": None if self.price is None else self.names[self.price],
        }


@dataclass(frozen=True)
class PriorScales:
    """The population priors of a layout, on the internal scale: the one place both samplers read them from.

    ``mean_sd`` (attribute,): SD of the Normal(0, .) prior of each population mean (of the log for a lognormal
    taste; on the reported constant for a constant); ``sd_sd`` (random,): scale of the HalfNormal prior of each
    random taste's SD; ``covariate_sd``: SD of the Normal(0, .) prior of each standardised covariate effect;
    ``lkj_eta``: the LKJ shape of the correlation matrix. Every scale is already multiplied by
    ``model.prior_scale``.
    """

    mean_sd: np.ndarray
    sd_sd: np.ndarray
    covariate_sd: float
    lkj_eta: float


def prior_scales(layout: ModelLayout, prior_scale: float = 1.0) -> PriorScales:
    """The priors of ``layout`` (:data:`PRIOR_SD` by taste kind, times ``prior_scale``).

    A normal alternative-specific constant's SD gets ``PRIOR_SD["constant_sd"]`` (its internal scale is the
    logit scale the user reads); every other random taste ``PRIOR_SD["sd"]`` (normal) or ``PRIOR_SD["log_sd"]``
    (lognormal) on its standardised scale.
    """
    n_k = len(layout.terms)
    mean_sd = np.array([PRIOR_SD["log_mean"] if layout.is_lognormal(k) else PRIOR_SD["mean"] for k in range(n_k)])
    sd_sd = np.array([PRIOR_SD["log_sd"] if layout.is_lognormal(k)
                      else PRIOR_SD["constant_sd"] if layout.terms[k].kind == "constant" else PRIOR_SD["sd"]
                      for k in layout.random])
    return PriorScales(mean_sd=mean_sd * prior_scale, sd_sd=sd_sd * prior_scale,
                       covariate_sd=PRIOR_SD["covariate"] * prior_scale, lkj_eta=PRIOR_SD["lkj_eta"])


def implied_priors(layout: ModelLayout, prior_scale: float = 1.0, prob: float = PRIOR_INTERVAL) -> Any:
    """The priors of ``taste_mean`` and ``taste_sd`` in the user's units, with their equal-tailed intervals.

    The internal priors (:func:`prior_scales`) mapped to the reported scale exactly as :func:`build_model`
    reports the parameters: a normal or fixed taste's mean and SD are multiplied by
    :meth:`ModelLayout.unit_factor`, a lognormal taste's mean of the log is shifted by
    :meth:`ModelLayout.log_shift` (its SD of the log has no unit). The quantiles are those of the Normal and
    HalfNormal distributions (scipy), not simulated.

    Returns
    -------
    pandas.DataFrame
        One row per (attribute, parameter) with ``parameter`` in {``taste_mean``, ``taste_sd``},
        ``distribution`` (e.g. ``Normal(0, 2.5)`` on the reported scale), ``eti_low`` / ``eti_high`` and
        ``scale`` (what the numbers are: ``"utility per unit"``, ``"log of the coefficient"``...);
        ``attrs["prob"] = prob``.
    """
    import pandas as pd
    from scipy import stats

    scales = prior_scales(layout, prior_scale)
    lo, hi = (1 - prob) / 2, (1 + prob) / 2
    rows = []
    for k, term in enumerate(layout.terms):
        logn = layout.is_lognormal(k)
        unit = 1.0 if logn else layout.unit_factor(k)
        centre = layout.log_shift(k) if logn else 0.0
        sd = scales.mean_sd[k] * unit
        wtp = layout.wtp_space and k != layout.price
        noun = "constant" if term.kind == "constant" else "willingness to pay" if wtp else "coefficient"
        what = "mean of the log of the coefficient" if logn else f"{noun} (mean across people)"
        rows.append({"attribute": term.name, "parameter": "taste_mean", "what": what,
                     "distribution": f"Normal({centre:.4g}, {sd:.4g})",
                     "eti_low": centre + sd * stats.norm.ppf(lo), "eti_high": centre + sd * stats.norm.ppf(hi)})
        if k in layout.random:
            s = scales.sd_sd[layout.random.index(k)] * unit
            rows.append({"attribute": term.name, "parameter": "taste_sd",
                         "what": ("SD of the log of the coefficient" if logn
                                  else f"SD of the {noun} across people"),
                         "distribution": f"HalfNormal({s:.4g})",
                         "eti_low": s * stats.halfnorm.ppf(lo), "eti_high": s * stats.halfnorm.ppf(hi)})
    out = pd.DataFrame(rows, columns=["attribute", "parameter", "what", "distribution", "eti_low", "eti_high"])
    out.attrs["prob"] = prob
    return out


def model_layout(panel: ChoicePanel, spec: Spec | Mapping[str, Any] | str | Path | None = None) -> ModelLayout:
    """Decide the internal scaling and the taste layout of ``panel`` under ``spec``."""
    spec = panel.spec if spec is None else load_spec(spec)
    panel = panel.with_spec(spec)
    terms = panel.terms
    names = [t.name for t in terms]
    scale = np.ones(len(terms))
    for k, term in enumerate(terms):
        if term.kind in _UNIT_KINDS:
            continue
        values = panel.cells.x[:, k]  # every available alternative of every real task
        sd = float(np.std(values)) if values.size else 0.0
        scale[k] = sd if sd > 0 else 1.0
    random = tuple(k for k, t in enumerate(terms) if t.taste != "fixed")
    fixed = tuple(k for k, t in enumerate(terms) if t.taste == "fixed")
    opts = spec.model
    if opts.correlated and len(random) < 2:
        raise SpecError("model.correlated = true needs at least two attributes with a random (normal/lognormal) taste.")
    price = None
    if opts.wtp_space:
        assert opts.price is not None  # checked by the spec
        if opts.price not in names:
            raise SpecError(f"model.price = {opts.price!r} is not a model attribute ({', '.join(names)}).")
        price = names.index(opts.price)
        if not (terms[price].taste == "lognormal" and terms[price].sign == "negative"):
            raise SpecError(
                f"In willingness-to-pay space the price attribute {opts.price!r} needs taste = \"lognormal\" and "
                "sign = \"negative\" (its coefficient is -lambda with lambda > 0)."
            )
    covariates = panel.covariates
    if covariates:
        shifts = spec.covariates.shifts if spec.covariates is not None else None
        if shifts is None:
            shifted = tuple(range(len(terms)))
        else:
            unknown = [s for s in shifts if not any(t.name == s or t.source == s for t in terms)]
            if unknown:
                raise SpecError(f"covariates.shifts names {unknown}, not model attributes ({', '.join(names)}).")
            shifted = tuple(k for k, t in enumerate(terms) if t.name in shifts or t.source in shifts)
        z_mean = panel.Z.mean(axis=0)
        z_scale = panel.Z.std(axis=0)
        z_scale[z_scale == 0] = 1.0
    else:
        shifted = ()
        z_mean = np.zeros(0)
        z_scale = np.ones(0)
    return ModelLayout(
        terms=tuple(terms), scale=scale, random=random, fixed=fixed, shifted=shifted, z_mean=z_mean,
        z_scale=z_scale, covariates=tuple(covariates), correlated=opts.correlated,
        centred=opts.parameterization == "centred", wtp_space=opts.wtp_space, price=price,
        constant_centre=None if opts.wtp_space else _constant_centre(panel, terms, scale, spec),
    )


def _constant_centre(panel: ChoicePanel, terms: tuple[Term, ...], scale: np.ndarray, spec: Spec) -> np.ndarray | None:
    r"""Mean attribute contrast of each alternative against the reference, ``c[a, k]``.

    The free parameter of a constant is :math:`\tilde a = a + \sum_k \bar\beta_k c_{ak}`,
    the utility contrast at the alternative's mean attribute levels, where
    :math:`\bar\beta_k` is the coefficient at the population location: :math:`\mu_k`
    for a fixed or normal taste, :math:`s_k e^{\mu_k}` (the **median** coefficient
    across people, not the mean) for a lognormal one. It is an exact change of
    variables of the population parameters (see :func:`_free_means`): it removes
    most of the posterior correlation between a constant and the taste means when,
    as with an opt-out, the alternatives' attribute levels sit far from the
    reference's.
    """
    const = [k for k, t in enumerate(terms) if t.kind == "constant"]
    if not const or spec.constants is None:
        return None
    cells = panel.cells
    ref = panel.alternatives.index(spec.constants.reference)
    centre = np.zeros((len(terms), len(terms)))
    slopes = [k for k, t in enumerate(terms) if t.kind != "constant"]

    def mean_of(j: int, k: int) -> float:
        v = cells.x[cells.alt == j, k] / scale[k]
        return float(v.mean()) if v.size else 0.0

    for a in const:
        j = panel.alternatives.index(terms[a].source)
        for k in slopes:
            centre[a, k] = mean_of(j, k) - mean_of(ref, k)
    return centre if np.any(centre) else None


def _centring_shift(mu, layout: ModelLayout):  # type: ignore[no-untyped-def]
    r""":math:`C\bar\beta(\mu)` over the last axis of ``mu``: the free constants minus the constants.

    Only the slopes' entries of ``mu`` enter (the centring's columns of the constants are 0), so
    the shift is the same whether it is computed from the population means :math:`\mu` or from
    the free means :math:`\tilde\mu`, which agree on the slopes.
    """
    load_backend()
    import pytensor.tensor as pt

    assert layout.constant_centre is not None
    n_k = len(layout.terms)
    lognormal = np.array([layout.is_lognormal(k) for k in range(n_k)])
    sign = np.array([layout.sign(k) for k in range(n_k)])
    # exp only of the lognormal columns: exp of a large linear mean would put inf * 0 into the gradient
    mean_coef = pt.where(lognormal, sign * pt.exp(pt.where(lognormal, mu, 0.0)), mu)
    return pt.dot(mean_coef, pt.as_tensor_variable(layout.constant_centre.T))


def _centred_constants(mu_free, layout: ModelLayout):  # type: ignore[no-untyped-def]
    r"""The population means :math:`\mu = \tilde\mu - C\bar\beta(\tilde\mu)` from the free ``mu_std``."""
    return mu_free - _centring_shift(mu_free, layout)


def _free_means(layout: ModelLayout, sigma: np.ndarray):  # type: ignore[no-untyped-def]
    r"""The free means ``mu_std`` over ``attribute``, with the prior :math:`\mu_k \sim N(0, \text{sigma}_k)`.

    Without constant centring the free means are the population means. With it, the free
    constants are :math:`\tilde a = a + \sum_k \bar\beta_k c_{ak}` (:func:`_constant_centre`),
    and the prior is still put on the **reported** means :math:`\mu` (constants :math:`a`
    included), independent normals:

    .. math:: p(\tilde\mu) = \prod_k N\big(\mu_k(\tilde\mu);\ 0,\ \text{sigma}_k\big).

    This is an exact density on :math:`\tilde\mu`: the map :math:`\tilde\mu \mapsto \mu`
    changes only the constants, by an amount that depends only on the slopes, so its
    Jacobian :math:`I - C\,\mathrm{diag}\,\bar\beta'` is unit triangular (determinant 1).
    Draws (prior predictive, simulation-based calibration) come from the same construction:
    :math:`\mu \sim N(0, \mathrm{diag}(\text{sigma})^2)`, then :math:`\tilde\mu = \mu + C\bar\beta(\mu)`.
    (Putting the normal prior on :math:`\tilde\mu` instead, as before, gave the reported
    constants a prior far wider than documented: SD 7.5 instead of 2.5 on the ferry scenario.)
    """
    load_backend()
    import pymc as pm
    import pytensor.tensor as pt
    from pytensor.tensor.type_other import NoneTypeT

    if layout.constant_centre is None:
        return pm.Normal("mu_std", 0.0, sigma, dims="attribute")

    def dist(sigma, size):  # type: ignore[no-untyped-def]
        # size: the batch shape in front of the (attribute,) core, or None / empty for one vector
        batch = not (size is None or isinstance(size.type, NoneTypeT) or size.type.shape == (0,))
        mu = pm.Normal.dist(0.0, sigma, size=pt.concatenate([size, sigma.shape[-1:]]) if batch else None)
        return mu + _centring_shift(mu, layout)

    def logp(value, sigma):  # type: ignore[no-untyped-def]
        return pm.logp(pm.Normal.dist(0.0, sigma), _centred_constants(value, layout)).sum(axis=-1)

    def support_point(rv, size, sigma):  # type: ignore[no-untyped-def]
        zero = pt.zeros_like(rv)  # the prior's mode: every reported mean at 0
        return zero + _centring_shift(zero, layout)

    return pm.CustomDist("mu_std", sigma, dist=dist, logp=logp, support_point=support_point,
                         signature="(k)->(k)", dims="attribute")


def _difference_data(panel: ChoicePanel, layout: ModelLayout) -> RaggedDifferences:
    return cell_differences(panel.cells, scale=layout.scale)


def _into_columns(values, columns: tuple[int, ...] | list[int], n_columns: int):  # type: ignore[no-untyped-def]
    """Place (person, len(columns)) ``values`` in ``columns`` of a (person, n_columns) matrix, zeros elsewhere."""
    load_backend()
    import pytensor.tensor as pt

    if list(columns) == list(range(n_columns)):
        return values
    select = np.zeros((len(columns), n_columns))
    select[np.arange(len(columns)), list(columns)] = 1.0
    return pt.dot(values, pt.constant(select))


def _panel_loglik(panel: ChoicePanel, layout: ModelLayout, beta, likelihood: str,  # type: ignore[no-untyped-def]
                  person_batch: int | None = None):
    """The scalar panel log-likelihood of the (person, attribute) tastes ``beta``.

    With ``person_batch``, an unbiased estimate from a random batch of persons (see :func:`build_model`).
    """
    if likelihood == "graph":
        data = difference_data(panel.X, panel.available, panel.task_mask, panel.chosen, scale=layout.scale)
        return task_loglik_graph(data, [beta[:, k] for k in range(data.D.shape[0])]).sum()
    load_backend()
    import pytensor

    from .logit_op import batch_layout, op_layout, padded_by_person, panel_logit_loglik

    data = _difference_data(panel, layout)
    if person_batch is not None:
        import pymc as pm

        # (person, ...) views padded to one width, so that one random index picks whole persons
        D_p, mask_p, n_o, n_t = padded_by_person(data)
        n_k, n_p = data.n_attributes, data.n_persons
        D_p = pytensor.shared(D_p, name="panel_differences_by_person", borrow=True)
        mask_p = pytensor.shared(mask_p, name="panel_available_by_person", borrow=True)
        idx = pm.Minibatch(np.arange(n_p), batch_size=int(person_batch))
        D_b = D_p[idx].transpose(1, 2, 0, 3).reshape((n_k, -1))
        mask_b = mask_p[idx].transpose(1, 0, 2).reshape((-1,))
        cell_task, owner, buckets = batch_layout(int(person_batch), n_o, n_t)
        return panel_logit_loglik(beta[idx], D_b, mask_b, cell_task, owner, buckets) * (n_p / person_batch)
    # shared, not constants: compiled code then neither embeds the data nor depends on it for caching
    op = op_layout(data)
    names = ("panel_differences", "panel_available", "panel_cell_task", "panel_task_person", "panel_buckets")
    return panel_logit_loglik(beta, *(pytensor.shared(v, name=nm, borrow=True) for v, nm in zip(op, names)))


def build_model(panel: ChoicePanel, spec: Spec | Mapping[str, Any] | str | Path | None = None, *,  # type: ignore[no-untyped-def]
                likelihood: str = "fused", person_batch: int | None = None, layout: ModelLayout | None = None):
    r"""Build the panel mixed logit of ``panel`` under ``spec`` as a :class:`pymc.Model`.

    A pure function: it reads the panel and the spec and samples nothing.

    Parameters
    ----------
    panel : ChoicePanel
    spec : Spec, mapping or path, optional
        Defaults to the spec the panel was validated with.
    likelihood : {"fused", "graph"}, default "fused"
        ``"fused"`` computes the panel log-likelihood and its gradient in one pass
        (:class:`hierchoice.logit_op.PanelLogitLoglik`, with its data as shared
        variables so compiled code does not embed it); ``"graph"`` writes it as a
        plain PyTensor graph (:func:`hierchoice.likelihood.task_loglik_graph`). Both
        give the same log-posterior to rounding; ``"graph"`` is the reference the
        fused Op is tested against.
    person_batch : int, optional
        For stochastic variational inference only: the likelihood is evaluated on
        a random batch of this many persons (drawn with replacement at each
        evaluation) and scaled by ``n_persons / person_batch``, an unbiased estimate
        of the full panel log-likelihood (Hoffman et al. 2013, JMLR 14). Not for
        NUTS, which needs the exact log-posterior.
    layout : ModelLayout, optional
        The panel's :func:`model_layout` under ``spec`` when the caller already has it
        (it reads the whole panel to set the internal scaling).

    Returns
    -------
    pymc.Model
        With dims ``person``, ``attribute``, ``random_attribute`` (and
        ``random_attribute_bis``, ``covariate``, ``shifted_attribute``) and
        deterministics in the user's units: ``taste_mean``, ``taste_sd``,
        ``taste_corr`` (correlated), ``covariate_effect`` (covariates),
        ``person_taste``, ``person_wtp`` (WTP space). The log-likelihood is the
        potential ``panel_loglik``:

        .. math:: \sum_n \sum_t \log P_{nt}(\beta_n).
    """
    load_backend()
    import pymc as pm
    import pytensor.tensor as pt

    if likelihood not in ("fused", "graph"):
        raise SpecError(f"likelihood must be 'fused' or 'graph', got {likelihood!r}.")
    if person_batch is not None and (likelihood != "fused" or person_batch < 1):
        raise SpecError(f"person_batch must be a positive number of persons (fused likelihood), got {person_batch!r}.")
    spec = panel.spec if spec is None else load_spec(spec)
    panel = panel.with_spec(spec)
    layout = model_layout(panel, spec) if layout is None else layout
    names = layout.names
    rnd = list(layout.random)
    n_p, n_k, n_r = panel.n_persons, len(names), len(rnd)
    ps = spec.model.prior_scale
    coords: dict[str, Any] = {
        "person": list(panel.persons),
        "attribute": names,
        "random_attribute": layout.random_names,
    }
    if layout.correlated:
        coords["random_attribute_bis"] = layout.random_names
    if layout.shifted:
        coords["covariate"] = list(layout.covariates)
        coords["shifted_attribute"] = layout.shifted_names

    priors = prior_scales(layout, ps)

    with pm.Model(coords=coords) as model:
        mu_free = _free_means(layout, priors.mean_sd)
        mu = _centred_constants(mu_free, layout) if layout.constant_centre is not None else mu_free
        # theta: the (person, attribute) latent tastes, one vectorised expression (a (1, attribute)
        # row while nothing varies by person); lognormal columns are exponentiated below
        theta = mu[None, :]

        if layout.shifted:
            gamma = pm.Normal("gamma_std", 0.0, priors.covariate_sd, dims=("covariate", "shifted_attribute"))
            z_std = pt.constant((panel.Z - layout.z_mean) / layout.z_scale)
            theta = theta + _into_columns(pt.dot(z_std, gamma), layout.shifted, n_k)

        if rnd:
            if layout.correlated:
                chol, corr, _ = pm.LKJCholeskyCov(
                    "chol_std", n=n_r, eta=priors.lkj_eta,
                    sd_dist=pm.HalfNormal.dist(sigma=priors.sd_sd, shape=n_r), compute_corr=True,
                )
                sd = pm.Deterministic("sd_std", pt.sqrt(pt.diag(chol @ chol.T)), dims="random_attribute")
            else:
                sd = pm.HalfNormal("sd_std", sigma=priors.sd_sd, dims="random_attribute")
            if layout.centred:
                loc = theta[:, rnd] if layout.shifted else mu[rnd]
                if layout.correlated:
                    eta = pm.MvNormal("eta_std", mu=loc, chol=chol, dims=("person", "random_attribute"))
                else:
                    eta = pm.Normal("eta_std", mu=loc, sigma=sd, dims=("person", "random_attribute"))
                is_random = np.isin(np.arange(n_k), rnd)
                theta = pt.switch(is_random[None, :], _into_columns(eta, rnd, n_k), theta)
            else:
                e = pm.Normal("e_std", 0.0, 1.0, dims=("person", "random_attribute"))
                dev = pt.dot(e, chol.T) if layout.correlated else e * sd
                theta = theta + _into_columns(dev, rnd, n_k)

        # coefficients of the standardised attributes (coef: before the WTP-space product)
        lognormal = layout.taste_map.lognormal
        coef = latent_to_coefficient(theta, replace(layout.taste_map, price=None), backend="pytensor")
        beta = latent_to_coefficient(theta, layout.taste_map, backend="pytensor")
        beta = pt.broadcast_to(beta, (n_p, n_k))

        pm.Potential("panel_loglik", _panel_loglik(panel, layout, beta, likelihood, person_batch))

        # --- reported quantities, in the user's units
        unit = np.array([layout.unit_factor(k) for k in range(n_k)])
        logshift = np.array([layout.log_shift(k) for k in range(n_k)])
        pm.Deterministic("taste_mean", pt.switch(lognormal, mu + logshift, mu * unit), dims="attribute")
        if rnd:
            r_unit = np.where(lognormal[rnd], 1.0, unit[rnd])
            pm.Deterministic("taste_sd", sd * r_unit, dims="random_attribute")
            if layout.correlated:
                pm.Deterministic("taste_corr", corr, dims=("random_attribute", "random_attribute_bis"))
        if layout.shifted:
            s_idx = list(layout.shifted)
            g_unit = np.where(lognormal[s_idx], 1.0, unit[s_idx])[None, :] / layout.z_scale[:, None]
            pm.Deterministic("covariate_effect", gamma * g_unit, dims=("covariate", "shifted_attribute"))
        beta_user = beta / layout.scale[None, :]
        pm.Deterministic("person_taste", beta_user, dims=("person", "attribute"))
        if layout.wtp_space:
            wtp_cols = [k for k in range(n_k) if k != layout.price]
            coords_w = [names[k] for k in wtp_cols]
            model.add_coord("wtp_attribute", coords_w)
            w = pt.broadcast_to(coef, (n_p, n_k))[:, wtp_cols]
            pm.Deterministic("person_wtp", w * unit[wtp_cols][None, :], dims=("person", "wtp_attribute"))
    return model
