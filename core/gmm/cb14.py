"""Campbell & Bozorgnia (2014), Earthquake Spectra 30(3), 1087-1115, vectorised."""
from __future__ import annotations

import math
from typing import ClassVar

import numpy as np

from quakefolio.core.gmm.base import FloatArray, GmmInput, VectorGmm, mean_z2p5_km, mechanism_flags

__all__ = ["Cb14"]


# --------------------------------------------------------------------------- #
# Campbell & Bozorgnia (2014)
# --------------------------------------------------------------------------- #
class Cb14(VectorGmm):
    r"""Campbell & Bozorgnia (2014) NGA-West2 model, vectorised.

    Uses ``mag``, ``rrup_km``, ``rjb_km``, ``rx_km``, ``ztor_km``,
    ``dip_deg``, ``rake_deg``, ``vs30_mps``; optional ``width_km`` (default
    Eq. 39 with a seismogenic depth of :attr:`DEFAULT_ZBOT_KM`), ``zhyp_km``
    (default Eqs. 35-38), ``z2p5_km`` (default Eqs. 33-34) and ``region``.

    Notes
    -----
    Median, Eq. 1:
    :math:`\ln Y = f_{mag} + f_{dis} + f_{flt} + f_{hng} + f_{site} + f_{sed}
    + f_{hyp} + f_{dip} + f_{atn}`, with
    :math:`\ln Y = \ln PGA` where :math:`Y < PGA` and :math:`T < 0.25` s.

    * :math:`f_{mag}` Eq. 2: :math:`c_0 + c_1 M` plus :math:`c_2, c_3, c_4`
      slopes above M 4.5, 5.5, 6.5.
    * :math:`f_{dis}` Eq. 3: :math:`(c_5 + c_6 M)\ln\sqrt{R_{RUP}^2 + c_7^2}`.
    * :math:`f_{flt}` Eqs. 4-6: :math:`(c_8 F_{RV} + c_9 F_{NM})` times a
      magnitude taper from 0 at M 4.5 to 1 at M 5.5.
    * :math:`f_{hng}` Eqs. 7-16: :math:`c_{10} f_{hng,R_X} f_{hng,R_{RUP}}
      f_{hng,M} f_{hng,Z} f_{hng,\delta}` with :math:`R_1 = W\cos\delta` (Eq. 11)
      and :math:`R_2 = 62M - 350` (Eq. 12).
    * :math:`f_{site}` Eqs. 17-19: :math:`f_{site,G} + S_J f_{site,J}`;
      :math:`f_{site,G} = c_{11}\ln(V/k_1) + k_2\{\ln[A_{1100} + c(V/k_1)^n]
      - \ln[A_{1100} + c]\}` for :math:`V_{S30} \le k_1`, else
      :math:`(c_{11} + k_2 n)\ln(V/k_1)`; c = 1.88, n = 1.18.
      :math:`f_{site,J}` (Japan only) is read as the sum of the term valid for
      all Vs30, :math:`(c_{13} + k_2 n)\ln(V/k_1)`, and the extra term below
      200 m/s, :math:`(c_{12} + k_2 n)[\ln(V/k_1) - \ln(200/k_1)]`; this
      reading is the one that keeps the site term continuous at 200 m/s.
    * :math:`f_{sed}` Eq. 20: :math:`(c_{14} + c_{15} S_J)(Z_{2.5} - 1)` for
      :math:`Z_{2.5} \le 1` km, 0 up to 3 km,
      :math:`c_{16} k_3 e^{-0.75}[1 - \exp(-0.25(Z_{2.5} - 3))]` beyond.
    * :math:`f_{hyp}` Eqs. 21-23, :math:`f_{dip}` Eq. 24, :math:`f_{atn}`
      Eq. 25: :math:`(c_{20} + \Delta c_{20})(R_{RUP} - 80)` beyond 80 km.

    :math:`A_{1100}` is the median PGA of the same scenario at
    :math:`V_{S30} = 1100` m/s with :math:`Z_{2.5}` from Eqs. 33-34 at 1100 m/s.

    Aleatory variability, Eqs. 27-32: :math:`\tau_{\ln Y}` and
    :math:`\phi_{\ln Y}` taper linearly from the M <= 4.5 to the M >= 5.5
    values; with :math:`\alpha = k_2 A_{1100}\{[A_{1100} + c(V/k_1)^n]^{-1}
    - (A_{1100} + c)^{-1}\}` for :math:`V_{S30} < k_1` (else 0),
    :math:`\tau^2 = \tau_{\ln Y}^2 + \alpha^2\tau_{\ln PGA}^2 + 2\alpha\rho\,
    \tau_{\ln Y}\tau_{\ln PGA}`,
    :math:`\phi^2 = \phi_{\ln Y_B}^2 + \phi_{\ln AF}^2 + \alpha^2\phi_{\ln PGA_B}^2
    + 2\alpha\rho\,\phi_{\ln Y_B}\phi_{\ln PGA_B}` with
    :math:`\phi_{\ln Y_B}^2 = \phi_{\ln Y}^2 - \phi_{\ln AF}^2`;
    :math:`\sigma = \sqrt{\tau^2 + \phi^2}`. Where the PGA floor of Eq. 1
    applies, the period's own tau and phi are kept.

    Regions: ``global`` and ``california`` (California anelastic term),
    ``japan`` and ``italy`` (Japan/Italy anelastic term; Japan also gets the
    Japan site, basin and Z2.5 relations), ``china`` (China anelastic term).

    References
    ----------
    Campbell, K.W. & Bozorgnia, Y. (2014). NGA-West2 ground motion model for
    the average horizontal components of PGA, PGV, and 5% damped linear
    acceleration response spectra. Earthquake Spectra 30(3), 1087-1115.
    """

    name = "CB14"
    reference = "Campbell & Bozorgnia (2014), Earthquake Spectra 30(3), 1087-1115"
    coefficient_file = "campbell_bozorgnia_2014.csv"
    tectonic_regions = ("active_crustal",)
    basin_input = ("z2p5_km", "not given: the Vs30 relation of CB14 Eqs. 33-34")
    supported_regions = ("global", "california", "japan", "italy", "china")
    applicability = {
        "mag": {"strike_slip": (3.3, 8.5), "reverse": (3.3, 8.0), "normal": (3.3, 7.5)},
        "rrup_km": (0.0, 300.0),
        "vs30_mps": (150.0, 1500.0),
        "z2p5_km": (0.0, 10.0),
        "ztor_km": (0.0, 20.0),
        "zhyp_km": (0.0, 20.0),
        "dip_deg": (15.0, 90.0),
    }
    #: period-independent site constants c and n (Eq. 18)
    SITE_C: ClassVar[float] = 1.88
    SITE_N: ClassVar[float] = 1.18
    #: reference rock Vs30 for A1100 [m/s]
    VS30_ROCK_MPS: ClassVar[float] = 1100.0
    #: depth to the bottom of the seismogenic crust used by Eq. 39 when width is unknown [km]
    DEFAULT_ZBOT_KM: ClassVar[float] = 15.0
    #: periods below this [s] are floored at PGA (Eq. 1)
    PGA_FLOOR_MAX_PERIOD_S: ClassVar[float] = 0.25
    _DC20_COLUMN: ClassVar[dict[str, str]] = {
        "global": "dc_20ca",
        "california": "dc_20ca",
        "japan": "dc_20jp",
        "italy": "dc_20jp",
        "china": "dc_20ch",
    }

    @staticmethod
    def default_width_km(mag, dip_deg, ztor_km, zbot_km=15.0) -> FloatArray:
        r"""Down-dip rupture width [km] when unknown, CB14 Eq. 39.

        .. math:: W = \min\left(\sqrt{10^{(M - 4.07)/0.98}},\
                  (Z_{BOT} - Z_{TOR})/\sin\delta\right)
        """
        return np.minimum(
            np.sqrt(10.0 ** ((np.asarray(mag) - 4.07) / 0.98)),
            (zbot_km - np.asarray(ztor_km)) / np.sin(np.radians(dip_deg)),
        )

    @staticmethod
    def default_zhyp_km(mag, dip_deg, ztor_km, width_km) -> FloatArray:
        r"""Hypocentral depth [km] when unknown, CB14 Eqs. 35-38.

        :math:`Z_{HYP} = Z_{TOR} + \exp(\min[f_{\Delta Z,M} + f_{\Delta Z,\delta},\
        \ln(0.9(Z_{BOR} - Z_{TOR}))])` with
        :math:`f_{\Delta Z,M} = \min(-4.317 + 0.984M, 2.325)` (Eq. 36),
        :math:`f_{\Delta Z,\delta} = \min(0.0445(\delta - 40), 0)` (Eq. 37) and
        :math:`Z_{BOR} = Z_{TOR} + W\sin\delta` (Eq. 38).
        """
        mag = np.asarray(mag, dtype=np.float64)
        dip = np.asarray(dip_deg, dtype=np.float64)
        zbor_minus_ztor = np.asarray(width_km) * np.sin(np.radians(dip))
        ln_dz = np.minimum(
            np.minimum(-4.317 + 0.984 * mag, 2.325) + np.minimum(0.0445 * (dip - 40.0), 0.0),
            np.log(0.9 * zbor_minus_ztor),
        )
        return np.asarray(ztor_km) + np.exp(ln_dz)

    def _site_terms(self, c, vs30, a1100, region: str) -> FloatArray:
        """f_site (Eqs. 17-19) [ln units] for broadcast coefficient accessor ``c``."""
        vs_ratio = vs30 / c("k_1")
        ln_ratio = np.log(vs_ratio)
        nonlinear = c("c_11") * ln_ratio + c("k_2") * (
            np.log(a1100 + self.SITE_C * vs_ratio**self.SITE_N) - np.log(a1100 + self.SITE_C)
        )
        linear = (c("c_11") + c("k_2") * self.SITE_N) * ln_ratio
        f_site = np.where(vs30 <= c("k_1"), nonlinear, linear)
        if region == "japan":
            f_site_j = (c("c_13") + c("k_2") * self.SITE_N) * ln_ratio
            below_200 = (c("c_12") + c("k_2") * self.SITE_N) * (
                ln_ratio - np.log(200.0 / c("k_1"))
            )
            f_site_j = f_site_j + np.where(vs30 <= 200.0, below_200, 0.0)
            f_site = f_site + f_site_j
        return f_site

    def _sediment_term(self, c, z2p5, region: str) -> FloatArray:
        """f_sed (Eq. 20) [ln units]."""
        shallow_slope = c("c_14") + (c("c_15") if region == "japan" else 0.0)
        deep = c("c_16") * c("k_3") * math.exp(-0.75) * (1.0 - np.exp(-0.25 * (z2p5 - 3.0)))
        shallow = shallow_slope * (z2p5 - 1.0)
        return np.where(z2p5 <= 1.0, shallow, np.where(z2p5 <= 3.0, 0.0, deep))

    def _ln_median_no_floor(self, inp: GmmInput, rows, geo, vs30, z2p5, a1100) -> FloatArray:
        """Eq. 1 without the PGA floor, shape (k, *shape)."""
        nd = len(inp.shape)
        c = lambda name: self._coeff(name, rows, nd)  # noqa: E731
        mag, rrup, rjb, rx, ztor, dip, width, zhyp, f_rv, f_nm = geo

        f_mag = (
            c("c_0")
            + c("c_1") * mag
            + c("c_2") * np.maximum(mag - 4.5, 0.0)
            + c("c_3") * np.maximum(mag - 5.5, 0.0)
            + c("c_4") * np.maximum(mag - 6.5, 0.0)
        )
        f_dis = (c("c_5") + c("c_6") * mag) * np.log(np.sqrt(rrup**2 + c("c_7") ** 2))
        f_flt = (c("c_8") * f_rv + c("c_9") * f_nm) * np.clip(mag - 4.5, 0.0, 1.0)

        # Hanging-wall term, Eqs. 7-16.
        r1 = width * np.cos(np.radians(dip))
        r2 = 62.0 * mag - 350.0
        with np.errstate(divide="ignore", invalid="ignore"):
            near = rx / r1
            far = (rx - r1) / (r2 - r1)
        f1 = c("h_1") + c("h_2") * near + c("h_3") * near**2
        f2 = np.maximum(c("h_4") + c("h_5") * far + c("h_6") * far**2, 0.0)
        f_hng_rx = np.where(rx < 0.0, 0.0, np.where(rx < r1, f1, f2))
        f_hng_rrup = np.divide(rrup - rjb, rrup, out=np.ones_like(rrup), where=rrup > 0.0)
        f_hng_m = np.where(
            mag <= 5.5, 0.0, np.minimum(mag - 5.5, 1.0) * (1.0 + c("a_2") * (mag - 6.5))
        )
        f_hng_z = np.where(ztor <= 16.66, 1.0 - 0.06 * ztor, 0.0)
        f_hng_dip = (90.0 - dip) / 45.0
        f_hng = c("c_10") * f_hng_rx * f_hng_rrup * f_hng_m * f_hng_z * f_hng_dip

        f_site = self._site_terms(c, vs30, a1100, inp.region)
        f_sed = self._sediment_term(c, z2p5, inp.region)
        f_hyp = np.clip(zhyp - 7.0, 0.0, 13.0) * (
            c("c_17") + (c("c_18") - c("c_17")) * np.clip(mag - 5.5, 0.0, 1.0)
        )
        f_dip = c("c_19") * dip * np.clip(5.5 - mag, 0.0, 1.0)
        dc20 = c(self._DC20_COLUMN[inp.region])
        f_atn = (c("c_20") + dc20) * np.maximum(rrup - 80.0, 0.0)
        return f_mag + f_dis + f_flt + f_hng + f_site + f_sed + f_hyp + f_dip + f_atn

    def _evaluate_rows(self, inp, rows):
        name = self.name
        shape = inp.shape
        nd = len(shape)
        mag = inp.field("mag", name)
        dip = inp.field("dip_deg", name)
        ztor = inp.field("ztor_km", name)
        rake = inp.field("rake_deg", name)
        if np.any(np.isnan(rake)):
            raise ValueError(
                f"{name}: 'rake_deg' must be given for every scenario (no unspecified "
                "mechanism term in this model); got NaN"
            )
        _, _, f_nm, f_rv = mechanism_flags(rake)
        width = inp.optional_field("width_km")
        if width is None or np.any(np.isnan(width)):
            width_default = self.default_width_km(mag, dip, ztor, self.DEFAULT_ZBOT_KM)
            if width is not None:
                width_default = np.where(np.isnan(width), width_default, width)
            width = width_default
            if np.any(~(width > 0.0)):
                raise ValueError(
                    f"{name}: width_km unknown and Eq. 39 gives no positive width; "
                    f"ztor_km must be < {self.DEFAULT_ZBOT_KM} km where width_km is unknown"
                )
        zhyp = inp.optional_field("zhyp_km")
        if zhyp is None or np.any(np.isnan(zhyp)):
            zhyp_default = self.default_zhyp_km(mag, dip, ztor, width)
            zhyp = zhyp_default if zhyp is None else np.where(np.isnan(zhyp), zhyp_default, zhyp)
        vs30 = inp.field("vs30_mps", name)
        z2p5_default = mean_z2p5_km(vs30, inp.region)
        z2p5 = inp.optional_field("z2p5_km")
        z2p5 = z2p5_default if z2p5 is None else np.where(np.isnan(z2p5), z2p5_default, z2p5)

        geo = tuple(
            np.broadcast_to(a, shape)[None]
            for a in (
                mag,
                inp.field("rrup_km", name),
                inp.field("rjb_km", name),
                inp.field("rx_km", name),
                ztor,
                dip,
                width,
                zhyp,
                f_rv,
                f_nm,
            )
        )
        mag1 = geo[0]
        vs30 = vs30[None]
        z2p5 = np.broadcast_to(z2p5, shape)[None]

        # A1100: PGA at Vs30 = 1100 m/s, Z2.5 from Eqs. 33-34 at 1100 m/s. The
        # site term at 1100 m/s is on the linear branch (k1 < 1100 for PGA), so
        # the A1100 placeholder of 0 passed here is never used.
        pga_row = np.array([self._pga_row], dtype=np.intp)
        vs_rock = np.full((1,) * (nd + 1), self.VS30_ROCK_MPS)
        z2p5_rock = mean_z2p5_km(vs_rock, inp.region)
        a1100 = np.exp(self._ln_median_no_floor(inp, pga_row, geo, vs_rock, z2p5_rock, 0.0))

        all_rows = np.union1d(rows, pga_row)
        ln_y = self._ln_median_no_floor(inp, all_rows, geo, vs30, z2p5, a1100)
        c = lambda col: self._coeff(col, all_rows, nd)  # noqa: E731

        # PGA floor for short periods, Eq. 1.
        period = c("period")
        i_pga = int(np.flatnonzero(all_rows == self._pga_row)[0])
        ln_pga = ln_y[i_pga : i_pga + 1]
        floored = (period > 0.0) & (period < self.PGA_FLOOR_MAX_PERIOD_S)
        ln_y = np.where(floored, np.maximum(ln_y, ln_pga), ln_y)

        # Aleatory variability, Eqs. 27-32.
        m_weight = np.clip(5.5 - mag1, 0.0, 1.0)
        tau_y = c("tau_2") + (c("tau_1") - c("tau_2")) * m_weight
        phi_y = c("phi_2") + (c("phi_1") - c("phi_2")) * m_weight
        tau_pga = tau_y[i_pga : i_pga + 1]
        phi_pga = phi_y[i_pga : i_pga + 1]
        phi_af = c("phi_lnAF")
        phi_af_pga = phi_af[i_pga : i_pga + 1]
        rho = c("rho_lnPGAlnY")
        vs_ratio = vs30 / c("k_1")
        alpha = np.where(
            vs30 < c("k_1"),
            c("k_2")
            * a1100
            * (
                1.0 / (a1100 + self.SITE_C * vs_ratio**self.SITE_N)
                - 1.0 / (a1100 + self.SITE_C)
            ),
            0.0,
        )
        tau = np.sqrt(tau_y**2 + alpha**2 * tau_pga**2 + 2.0 * alpha * rho * tau_y * tau_pga)
        phi_y_b = np.sqrt(phi_y**2 - phi_af**2)
        phi_pga_b = np.sqrt(phi_pga**2 - phi_af_pga**2)
        phi = np.sqrt(
            phi_y_b**2
            + phi_af**2
            + alpha**2 * phi_pga_b**2
            + 2.0 * alpha * rho * phi_y_b * phi_pga_b
        )
        sigma = np.sqrt(tau**2 + phi**2)

        keep = np.searchsorted(all_rows, rows)
        out_shape = (rows.size,) + shape
        return (
            np.broadcast_to(ln_y[keep], out_shape).copy(),
            np.broadcast_to(tau[keep], out_shape).copy(),
            np.broadcast_to(phi[keep], out_shape).copy(),
            np.broadcast_to(sigma[keep], out_shape).copy(),
        )
