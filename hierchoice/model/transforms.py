r"""The one map from latent tastes to utility coefficients, for NumPy arrays and PyTensor graphs alike.

A person's latent taste vector :math:`\theta_n` (one entry per attribute) becomes the coefficients
:math:`\beta_n` of the utility as follows:

* a ``normal`` or ``fixed`` taste is its own coefficient, :math:`\beta_{nk} = \theta_{nk}`;
* a ``lognormal`` taste is :math:`\beta_{nk} = s_k \exp(\theta_{nk})` with sign :math:`s_k \in \{-1, 1\}`;
* in willingness-to-pay space (Train & Weeks 2005) the price coefficient is :math:`-\lambda_n` (lognormal
  with negative sign) and every other coefficient is :math:`\lambda_n w_{nk}`, where :math:`w_{nk}` is the
  transformed taste of attribute :math:`k`.

The model (on its internal scale), the simulated population tastes, LOO's simulated persons and the simulator of
invented panels all call :func:`latent_to_coefficient`, so the map is written once.

Train, K. & Weeks, M. (2005). Discrete choice models in preference space and willingness-to-pay space. In
Scarpa & Alberini (eds.), *Applications of Simulation Methods in Environmental and Resource Economics*, 1-16.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["TasteMap", "latent_to_coefficient"]


@dataclass(frozen=True)
class TasteMap:
    """What :func:`latent_to_coefficient` needs to know of each attribute.

    ``lognormal`` and ``sign`` have one entry per attribute; ``price`` is the index of the price attribute in
    willingness-to-pay space, else None.
    """

    lognormal: np.ndarray
    sign: np.ndarray
    price: int | None = None

    @classmethod
    def of(cls, tastes: list[str] | tuple[str, ...], signs: list[float] | tuple[float, ...] | np.ndarray,
           price: int | None = None) -> TasteMap:
        return cls(np.array([t == "lognormal" for t in tastes], dtype=bool), np.asarray(signs, dtype=float), price)


def latent_to_coefficient(theta: Any, taste_map: TasteMap, *, backend: str = "numpy") -> Any:
    """Map latent tastes ``theta`` (..., attribute) to utility coefficients of the same shape.

    ``backend="pytensor"`` builds the same map as a PyTensor graph (used by the model). The exponential is taken
    of the lognormal columns only, so a large normal taste can never overflow into a gradient.
    """
    if backend == "pytensor":
        import pytensor.tensor as pt

        where, exp = pt.switch, pt.exp
    else:
        theta = np.asarray(theta, dtype=float)
        where, exp = np.where, np.exp
    lognormal = taste_map.lognormal
    coef = theta
    if lognormal.any():
        coef = where(lognormal, taste_map.sign * exp(where(lognormal, theta, 0.0)), theta)
    if taste_map.price is not None:
        lam = -coef[..., taste_map.price]  # lambda > 0
        is_price = np.arange(lognormal.size) == taste_map.price
        coef = coef * where(is_price, 1.0, lam[..., None])
    return coef
