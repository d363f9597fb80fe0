r"""Pezeshk, Zandieh & Tavakoli (2011), BSSA 101(4), 1859-1870, vectorised.

Stable-continental-region model (eastern North America, hybrid empirical
method) for hard rock.

References
----------
Pezeshk, S., Zandieh, A. & Tavakoli, B. (2011). Hybrid empirical ground-motion
prediction equations for eastern North America using NGA models and updated
seismological parameters. Bulletin of the Seismological Society of America
101(4), 1859-1870, doi:10.1785/0120100144. Median: the model equation in
log10 units (Eq. 4); aleatory standard deviation of log10 Y: Eqs. 5-6
(equation numbers from memory); coefficients of the paper's coefficient table
(read from the data file shipped with the installed ``pygmm`` package).
"""
from __future__ import annotations

import math
from typing import ClassVar

import numpy as np
from numpy.typing import NDArray

from quakefolio.core.gmm.base import VectorGmm

__all__ = ["Pzt11"]

#: ln(10): converts the model's log10 values to natural-log units
LN10 = math.log(10.0)


class Pzt11(VectorGmm):
    r"""Pezeshk, Zandieh & Tavakoli (2011) stable-continental model, vectorised.

    Uses ``mag`` and ``rrup_km``. ``vs30_mps`` is not used: the model has no
    site term and predicts motion on its reference hard rock,
    :attr:`REFERENCE_VS30_MPS` (``uses_vs30`` is False).

    Notes
    -----
    Median in log10 units with Y in g, :math:`R = \sqrt{R_{rup}^2 + c_{11}^2}`:

    .. math::
        \log_{10} Y = c_1 + c_2 M + c_3 M^2
          + (c_4 + c_5 M)\min[\log_{10} R, \log_{10} 70]
          + (c_6 + c_7 M)\max[\min\{\log_{10}(R/70), \log_{10}(140/70)\}, 0]
          + (c_8 + c_9 M)\max[\log_{10}(R/140), 0] + c_{10} R

    Aleatory variability of :math:`\log_{10} Y`:
    :math:`\sigma_{\log Y} = c_{12} M + c_{13}` for :math:`M \le 7`,
    :math:`-6.95\times10^{-3} M + c_{14}` above (continuous at M 7), and the
    total :math:`\sigma_T = \sqrt{\sigma_{\log Y}^2 + \sigma_{Reg}^2}`.

    Natural-log results: :math:`\ln Y = \ln(10)\log_{10} Y` and
    :math:`\sigma = \ln(10)\,\sigma_T` (e.g. 0.58 at M 6 for PGA). The paper
    gives only the total: ``tau`` and ``phi`` are NaN (``has_tau_phi`` is
    False), so the model serves hazard curves, not event ground-motion
    fields that need the between/within-event split.

    Only ``region = "global"`` is accepted (no regional terms).
    """

    name = "PZT11"
    reference = (
        "Pezeshk, Zandieh & Tavakoli (2011), Bulletin of the Seismological Society of "
        "America 101(4), 1859-1870"
    )
    coefficient_file = "pezeshk_zandieh_tavakoli_2011.csv"
    tectonic_regions = ("stable_continental",)
    supported_regions = ("global",)
    has_tau_phi = False
    uses_vs30 = False
    applicability = {"mag": (5.0, 8.0), "rrup_km": (0.0, 1000.0)}
    #: reference hard-rock Vs30 of the medians [m/s]
    REFERENCE_VS30_MPS: ClassVar[float] = 2000.0
    #: hinge distances of the three-segment geometric spreading [km]
    R1_KM: ClassVar[float] = 70.0
    R2_KM: ClassVar[float] = 140.0
    #: magnitude above which the sigma slope is fixed, and that slope
    SIGMA_BREAK_MAG: ClassVar[float] = 7.0
    SIGMA_SLOPE_LARGE_M: ClassVar[float] = -6.95e-3

    def _evaluate_rows(self, inp, rows: NDArray[np.intp]):
        mag = inp.field("mag", self.name)[None]
        rrup = inp.field("rrup_km", self.name)[None]
        nd = len(inp.shape)
        c = lambda name: self._coeff(name, rows, nd)  # noqa: E731

        r = np.sqrt(rrup**2 + c("c_11") ** 2)
        log_r = np.log10(r)
        log10_y = (
            c("c_1") + c("c_2") * mag + c("c_3") * mag**2
            + (c("c_4") + c("c_5") * mag) * np.minimum(log_r, math.log10(self.R1_KM))
            + (c("c_6") + c("c_7") * mag)
            * np.clip(log_r - math.log10(self.R1_KM), 0.0, math.log10(self.R2_KM / self.R1_KM))
            + (c("c_8") + c("c_9") * mag) * np.maximum(log_r - math.log10(self.R2_KM), 0.0)
            + c("c_10") * r
        )
        sigma_log = np.where(
            mag <= self.SIGMA_BREAK_MAG,
            c("c_12") * mag + c("c_13"),
            self.SIGMA_SLOPE_LARGE_M * mag + c("c_14"),
        )
        ln_y = LN10 * log10_y
        shape = ln_y.shape
        sigma = np.broadcast_to(LN10 * np.sqrt(sigma_log**2 + c("sigma_reg") ** 2), shape).copy()
        nan = np.full(shape, np.nan)
        return ln_y, nan, nan.copy(), sigma
