r"""A blocked (Gibbs-style) MCMC sampler for the panel mixed logit: an exact second method beside NUTS.

It targets the posterior of the **centred** model that :func:`hierchoice.model.build_model`
writes (``model.parameterization = "centred"``): the same priors (:data:`~hierchoice.model.PRIOR_SD`
times ``prior_scale``), the same internal standardisation and the same constant centring.
With :math:`\eta_n` the latent random tastes of person :math:`n` (log-tastes for
lognormal attributes), :math:`m_n = \mu_R + \Gamma_R^\top z_n` their population mean,
:math:`\Sigma = LL^\top` their covariance and :math:`\ell_n` the person's panel
log-likelihood, one **sweep** updates, in turn,

1. **persons** — every :math:`\eta_n` from
   :math:`\pi(\eta_n) \propto N(\eta_n; m_n, \Sigma)\,e^{\ell_n(\beta_n)}` by preconditioned
   MALA, all persons in one parallel numba pass
   (:func:`hierchoice.inference.blocked.kernels.mala_persons`). The preconditioner is
   :math:`(\Sigma^{-1} + \hat F_n)^{-1}`, with :math:`\hat F_n` the person's logit information
   frozen at the end of warm-up (or :math:`\Sigma` alone, ``precondition="population"``); the
   step size is adapted person by person during warm-up towards acceptance 0.574
   (Roberts & Rosenthal 1998);
2. **location** — the free means :math:`\tilde\mu` (``mu_std``) and covariate effects
   :math:`\Gamma` (``gamma_std``): an exact draw from their normal conditional (Bayesian
   multivariate regression on the sufficient statistics; Rossi, Allenby & McCulloch
   2005, ch. 2.12 and 5) when every taste is random and the map
   :math:`\tilde\mu \mapsto \mu` is linear, otherwise adaptive random-walk Metropolis
   MALA with the full-data gradient, preconditioned by the warm-up covariance (Haario,
   Saksman & Tamminen 2001), on the full conditional, which then includes the
   full-data likelihood through the fixed coefficients;
3. **covariance** — :math:`\Sigma` (``chol_std``) or the SDs (``sd_std``) by an
   independence Metropolis–Hastings step whose proposal is the conjugate
   inverse-Wishart (inverse-gamma) conditional under a stand-in prior, corrected to
   the model's prior (HalfNormal SDs, LKJ(2) correlations as PyMC's
   ``LKJCholeskyCov`` defines its density); its cost does not grow with the persons;
4. **interweaving** (ASIS; Yu & Meng 2011) — with :math:`e_n = L^{-1}(\eta_n - m_n)`
   held fixed, Langevin steps on the Cholesky factor ``L`` and every free mean (fixed
   tastes' and centred constants' too) in the non-centred form, whose conditional is the
   prior times the full-data likelihood of :math:`\eta_n = m_n + L e_n`; preconditioned by its expected
   information (simplified manifold MALA, Girolami & Calderhead 2011, during
   warm-up; the metric is frozen afterwards). This keeps SDs and correlations mixing
   where the centred updates alone crawl.

Each block leaves the joint posterior invariant, so the sweep does; draws of the free
variables of the centred model are turned into the reported quantities by the PyMC
model itself (:func:`pymc.compute_deterministics`), so ``taste_mean``, ``taste_sd``,
``taste_corr``, ``covariate_effect`` and ``person_taste`` are identical in meaning to
those of NUTS. See ``docs/blocked.md``.
"""

from __future__ import annotations

from .chain import BlockedSettings, initial_state, run_chain, sample_blocked, sweep
from .problem import (
    METHOD_NAME,
    BlockedProblem,
    BlockedState,
    PopulationState,
    blocked_problem,
    locations,
    log_density,
    person_betas,
)
from .shard import CHUNK, LocalShards, PersonShard

__all__ = ["CHUNK", "METHOD_NAME", "BlockedProblem", "BlockedSettings", "BlockedState", "LocalShards", "PersonShard", "PopulationState", "blocked_problem", "log_density", "sample_blocked", "initial_state", "locations", "person_betas", "run_chain", "sweep"]
