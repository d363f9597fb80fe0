r"""Abrahamson, Gregor & Addo (2016), Earthquake Spectra 32(1), 23-44, vectorised.

Subduction-zone model for interface and intraslab earthquakes (one class; the
event type is the per-scenario field ``GmmInput.intraslab``).

References
----------
Abrahamson, N., Gregor, N. & Addo, K. (2016). BC Hydro ground motion prediction
equations for subduction earthquakes. Earthquake Spectra 32(1), 23-44,
doi:10.1193/051712EQS188MR. Median Eq. 1 with f_mag Eq. 2, f_depth Eq. 3,
f_FABA Eq. 4 and f_site Eq. 5; coefficients of Table 3 (read from the data file
shipped with the installed ``pygmm`` package).
"""
from __future__ import annotations

from typing import ClassVar

import numpy as np
from numpy.typing import NDArray

from quakefolio.core.gmm.base import FloatArray, GmmInput, VectorGmm

__all__ = ["Ag16"]


class Ag16(VectorGmm):
    r"""Abrahamson, Gregor & Addo (2016) subduction model, vectorised.

    Uses ``mag``, ``vs30_mps`` and ``intraslab`` (1 intraslab, 0 interface);
    ``rrup_km`` for interface scenarios; ``rhyp_km`` and ``zhyp_km`` (not
    NaN) for intraslab scenarios; optional ``backarc`` (``None``: forearc or
    unknown everywhere). A batch may mix both event types; a field is needed
    only if some scenario uses it.

    Notes
    -----
    Median, Eq. 1, in ln units with Y in g, with :math:`F = 1` for intraslab
    and 0 for interface events, :math:`R = R_{hypo}` for intraslab and
    :math:`R_{rup}` for interface events:

    .. math::
        \ln Y = \theta_1 + \theta_4 \Delta C_1
              + [\theta_2 + \theta_{14} F + \theta_3 (M - 7.8)]
                \ln[R + C_4 \exp(\theta_9 (M - 6))]
              + \theta_6 R + \theta_{10} F + f_{mag}(M) + F f_{depth}(Z_h)
              + F_{FABA} f_{FABA}(R) + f_{site}(PGA_{1000}, V_{S30})

    * :math:`f_{mag}` Eq. 2: :math:`\theta_4 (M - C_1') + \theta_{13}(10 - M)^2`
      for :math:`M \le C_1'`, :math:`\theta_5 (M - C_1') + \theta_{13}(10 - M)^2`
      above, with :math:`C_1' = C_1 + \Delta C_1`, :math:`C_1 = 7.8`.
    * :math:`f_{depth}` Eq. 3 (intraslab only):
      :math:`\theta_{11} (\min(Z_h, 120) - 60)`, :math:`Z_h` hypocentral depth [km].
    * :math:`f_{FABA}` Eq. 4, applied for backarc sites (:math:`F_{FABA} = 1`;
      forearc or unknown: 0): intraslab
      :math:`\theta_7 + \theta_8 \ln(\max(R_{hypo}, 85)/40)`, interface
      :math:`\theta_{15} + \theta_{16} \ln(\max(R_{rup}, 100)/40)`.
    * :math:`f_{site}` Eq. 5, with :math:`V^* = \min(V_{S30}, 1000)`: for
      :math:`V_{S30} < V_{lin}`,
      :math:`\theta_{12}\ln(V^*/V_{lin}) - b\ln(PGA_{1000} + c)
      + b\ln(PGA_{1000} + c (V^*/V_{lin})^n)`; otherwise
      :math:`(\theta_{12} + b n)\ln(V^*/V_{lin})`. :math:`PGA_{1000}` is the
      median PGA of the same scenario at :math:`V_{S30} = 1000` m/s.

    :math:`\Delta C_1`, the shift of the magnitude-scaling break: the
    central-branch values, -0.3 for intraslab events at every period, and for
    interface events 0.2 up to 0.3 s, 0.1 at 0.5 s, 0.0 at 1 s, -0.1 at 2 s and
    -0.2 from 3 s (from memory of the paper; they are also the values of the
    reference library), linear in ln(period) in between; PGA takes the
    short-period value.

    Aleatory variability: period-independent :math:`\phi = 0.60`,
    :math:`\tau = 0.43` (Table 3), :math:`\sigma = \sqrt{\phi^2 + \tau^2}`.

    Only ``region = "global"`` is accepted: the 2016 model has no regional terms.
    """

    name = "AG16"
    reference = "Abrahamson, Gregor & Addo (2016), Earthquake Spectra 32(1), 23-44"
    coefficient_file = "abrahamson_gregor_addo_2016.csv"
    tectonic_regions = ("subduction_interface", "subduction_intraslab")
    supported_regions = ("global",)
    applicability = {
        "mag": {"interface": (6.0, 9.5), "intraslab": (5.0, 8.0)},
        "rrup_km": (0.0, 300.0),
        "rhyp_km": (0.0, 300.0),
        "vs30_mps": (150.0, 1500.0),
    }
    #: magnitude-scaling break before the Delta C1 shift (Eq. 2)
    C1: ClassVar[float] = 7.8
    #: reference Vs30 of PGA_1000 and cap of V* (Eq. 5) [m/s]
    VS30_ROCK_MPS: ClassVar[float] = 1000.0
    #: intraslab depth term: cap and centre of the hypocentral depth (Eq. 3) [km]
    DEPTH_CAP_KM: ClassVar[float] = 120.0
    DEPTH_CENTRE_KM: ClassVar[float] = 60.0
    #: forearc/backarc term (Eq. 4): distance floors for intraslab and interface, scale [km]
    FABA_FLOOR_SLAB_KM: ClassVar[float] = 85.0
    FABA_FLOOR_INTERFACE_KM: ClassVar[float] = 100.0
    FABA_SCALE_KM: ClassVar[float] = 40.0
    #: central Delta C1: intraslab, and interface at these periods [s] (ln-period interpolation)
    DC1_INTRASLAB: ClassVar[float] = -0.3
    DC1_INTERFACE_PERIODS_S: ClassVar[tuple[float, ...]] = (0.3, 0.5, 1.0, 2.0, 3.0)
    DC1_INTERFACE_VALUES: ClassVar[tuple[float, ...]] = (0.2, 0.1, 0.0, -0.1, -0.2)

    def delta_c1(self, period_s, intraslab) -> FloatArray:
        r"""Central-branch :math:`\Delta C_1` [-] for periods and event types (class notes).

        Parameters
        ----------
        period_s : array_like [s]
            Spectral period; 0 for PGA (takes the short-period value).
        intraslab : array_like of {0, 1}
            Event type, broadcast against ``period_s``.

        Returns
        -------
        ndarray
        """
        period = np.maximum(np.asarray(period_s, dtype=np.float64), 1e-3)
        interface = np.interp(
            np.log(period),
            np.log(self.DC1_INTERFACE_PERIODS_S),
            self.DC1_INTERFACE_VALUES,
        )
        return np.where(np.asarray(intraslab) == 1, self.DC1_INTRASLAB, interface)

    def _site_term(self, c, vs30, pga1000) -> FloatArray:
        """f_site, Eq. 5 [ln units], for the broadcast coefficient accessor ``c``."""
        ratio = np.minimum(vs30, self.VS30_ROCK_MPS) / c("v_lin")
        ln_ratio = np.log(ratio)
        nonlinear = (
            c("t_12") * ln_ratio
            - c("b") * np.log(pga1000 + c("c"))
            + c("b") * np.log(pga1000 + c("c") * ratio ** c("n"))
        )
        linear = (c("t_12") + c("b") * c("n")) * ln_ratio
        return np.where(vs30 < c("v_lin"), nonlinear, linear)

    def _rock_terms(self, c, period, mag, dist, slab, backarc, zhyp) -> FloatArray:
        """Every term of Eq. 1 but f_site [ln g], shape (k, *shape)."""
        dc1 = self.delta_c1(period, slab)
        path = (c("t_2") + c("t_14") * slab + c("t_3") * (mag - self.C1)) * np.log(
            dist + c("c_4") * np.exp(c("t_9") * (mag - 6.0))
        )
        dm = mag - (self.C1 + dc1)
        f_mag = np.where(dm <= 0.0, c("t_4"), c("t_5")) * dm + c("t_13") * (10.0 - mag) ** 2
        f_depth = c("t_11") * (np.minimum(zhyp, self.DEPTH_CAP_KM) - self.DEPTH_CENTRE_KM)
        faba_slab = c("t_7") + c("t_8") * np.log(
            np.maximum(dist, self.FABA_FLOOR_SLAB_KM) / self.FABA_SCALE_KM
        )
        faba_interface = c("t_15") + c("t_16") * np.log(
            np.maximum(dist, self.FABA_FLOOR_INTERFACE_KM) / self.FABA_SCALE_KM
        )
        f_faba = backarc * np.where(slab == 1.0, faba_slab, faba_interface)
        return (
            c("t_1") + c("t_4") * dc1 + path + c("t_6") * dist + c("t_10") * slab
            + f_mag + slab * f_depth + f_faba
        )

    def _event_inputs(self, inp: GmmInput) -> tuple[FloatArray, ...]:
        """Event type, distance R, hypocentral depth and backarc flag, each of shape (1, *shape)."""
        slab = inp.field("intraslab", self.name)
        is_slab = slab == 1.0
        if is_slab.all():
            rrup = np.zeros(inp.shape)
        else:
            rrup = inp.field("rrup_km", f"{self.name} (interface scenarios)")
        if is_slab.any():
            rhyp = inp.field("rhyp_km", f"{self.name} (intraslab scenarios)")
            zhyp = inp.field("zhyp_km", f"{self.name} (intraslab scenarios)")
            bad = is_slab & np.isnan(zhyp)
            if bad.any():
                where = tuple(int(i) for i in np.argwhere(bad)[0])
                raise ValueError(
                    f"{self.name}: 'zhyp_km' must be given for intraslab scenarios; "
                    f"got NaN at index {where}"
                )
            dist = np.where(is_slab, rhyp, rrup)
            zhyp = np.where(is_slab, zhyp, self.DEPTH_CENTRE_KM)
        else:
            dist = rrup
            zhyp = np.full(inp.shape, self.DEPTH_CENTRE_KM)
        backarc = inp.optional_field("backarc")
        backarc = np.zeros(inp.shape) if backarc is None else backarc
        return slab[None], dist[None], zhyp[None], backarc[None]

    def _evaluate_rows(self, inp, rows: NDArray[np.intp]):
        slab, dist, zhyp, backarc = self._event_inputs(inp)
        mag = inp.field("mag", self.name)[None]
        vs30 = inp.field("vs30_mps", self.name)[None]
        nd = len(inp.shape)

        def accessor(r):
            return lambda name: self._coeff(name, r, nd)

        # PGA_1000: the scenario's median PGA at Vs30 = 1000 m/s (Eq. 5 definition); V_lin of
        # the PGA row is below 1000 m/s, so f_site takes its linear branch there.
        pga_row = np.array([self._pga_row], dtype=np.intp)
        cp = accessor(pga_row)
        rock_vs30 = np.full((1,) + (1,) * nd, self.VS30_ROCK_MPS)
        ln_pga1000 = self._rock_terms(cp, cp("period"), mag, dist, slab, backarc, zhyp)
        ln_pga1000 = ln_pga1000 + self._site_term(cp, rock_vs30, 0.0)
        pga1000 = np.exp(ln_pga1000)

        c = accessor(rows)
        ln_y = self._rock_terms(c, c("period"), mag, dist, slab, backarc, zhyp)
        ln_y = ln_y + self._site_term(c, vs30, pga1000)

        shape = ln_y.shape
        tau = np.broadcast_to(c("tau"), shape).copy()
        phi = np.broadcast_to(c("phi"), shape).copy()
        return ln_y, tau, phi, np.sqrt(tau**2 + phi**2)

