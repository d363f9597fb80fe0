"""Abrahamson, Silva & Kamai (2014), Earthquake Spectra 30(3), 1025-1055, vectorised."""
from __future__ import annotations

import math
from typing import ClassVar

import numpy as np

from quakefolio.core.gmm.base import FloatArray, GmmInput, VectorGmm, mechanism_flags

__all__ = ["Ask14"]


def _hat_weights(x: FloatArray, knots: tuple[float, ...]) -> list[FloatArray]:
    """Weights of piecewise-linear interpolation at ``x`` between ``knots`` (constant outside).

    ``sum_i w_i(x) * v_i`` is ``np.interp(x, knots, v)`` for any values ``v``.
    """
    eye = np.eye(len(knots))
    return [np.interp(x, knots, eye[i]) for i in range(len(knots))]


# --------------------------------------------------------------------------- #
# Abrahamson, Silva & Kamai (2014)
# --------------------------------------------------------------------------- #
class Ask14(VectorGmm):
    r"""Abrahamson, Silva & Kamai (2014) NGA-West2 model, vectorised.

    Uses ``mag``, ``rrup_km``, ``rjb_km``, ``rx_km``, ``ztor_km``, ``dip_deg``,
    ``rake_deg``, ``vs30_mps``; optional ``ry0_km`` (``None`` or NaN: the Rjb
    taper of Eq. 15), ``width_km`` (``None`` or NaN: :meth:`default_width_km`),
    ``z1p0_km`` (``None`` or NaN: the model's own reference depth, Eqs. 18-19, so
    the basin term is 0), ``vs30_measured`` (``None``: inferred Vs30) and ``region``.
    Mainshocks only: the aftershock term :math:`F_{AS} f_{11}` is 0.

    Notes
    -----
    Median, Eq. 1 (ln units, Sa in g):
    :math:`\ln Sa = f_1 + F_{RV} f_7 + F_N f_8 + f_5 + F_{HW} f_4 + f_6 + f_{10}
    + \mathrm{Regional}`, with :math:`F_{RV} = 1` for 30 < rake < 150 and
    :math:`F_N = 1` for -150 < rake < -30.

    * :math:`f_1` Eqs. 2-4: three magnitude segments split at :math:`M_2` (= 5)
      and :math:`M_1`; for :math:`M_2 \le M \le M_1`,
      :math:`a_1 + a_4 (M - M_1) + a_8 (8.5 - M)^2 + [a_2 + a_3 (M - M_1)]\ln R
      + a_{17} R_{RUP}` (:math:`a_5` replaces :math:`a_4` above :math:`M_1`; below
      :math:`M_2` the values at :math:`M_2` plus :math:`a_6 (M - M_2) + a_7 (M - M_2)^2`),
      :math:`R = \sqrt{R_{RUP}^2 + c_{4M}^2}`, :math:`c_{4M} = c_4 - (c_4 - 1)
      \min(\max(5 - M, 0), 1)`.
    * :math:`f_7, f_8` Eqs. 5-6: :math:`a_{11}` and :math:`a_{12}` times
      :math:`\min(\max(M - 4, 0), 1)`.
    * :math:`f_5` Eqs. 7-8: :math:`(a_{10} + b n)\ln(V_{S30}^*/V_{LIN})` for
      :math:`V_{S30} \ge V_{LIN}`, else :math:`a_{10}\ln(V_{S30}^*/V_{LIN})
      - b\ln(Sa_{1180} + c) + b\ln(Sa_{1180} + c (V_{S30}^*/V_{LIN})^n)`;
      :math:`V_{S30}^* = \min(V_{S30}, V_1)` with :math:`V_1` = 1500 m/s for
      T <= 0.5 s, :math:`\exp[-0.35\ln(T/0.5) + \ln 1500]` for 0.5 < T < 3 s and
      800 m/s for T >= 3 s. :math:`Sa_{1180}` is the median of the same scenario and
      period at :math:`V_{S30}` = 1180 m/s (regional terms included, basin term 0).
    * :math:`f_4` Eqs. 9-15: :math:`a_{13} T_1 T_2 T_3 T_4 T_5` with
      :math:`T_1 = \min(90 - \delta, 60)/45`; :math:`T_2` = 0 for M <= 5.5,
      :math:`1 + a_{2HW}(M - 6.5) - (1 - a_{2HW})(M - 6.5)^2` up to 6.5,
      :math:`1 + a_{2HW}(M - 6.5)` above (:math:`a_{2HW}` = 0.2);
      :math:`T_3 = h_1 + h_2 (R_X/R_1) + h_3 (R_X/R_1)^2` for :math:`R_X < R_1`,
      :math:`1 - (R_X - R_1)/(R_2 - R_1)` up to :math:`R_2`, 0 beyond
      (:math:`R_1 = W\cos\delta`, :math:`R_2 = 3R_1`, h = 0.25, 1.5, -0.75);
      :math:`T_4 = \max(1 - Z_{TOR}^2/100, 0)`; :math:`T_5 = \min(\max(1 - (R_{Y0}
      - R_{Y1})/5, 0), 1)` with :math:`R_{Y1} = R_X\tan 20^\circ` (Eq. 14), or
      :math:`\max(1 - R_{JB}/30, 0)` where Ry0 is unknown (Eq. 15).
      :math:`F_{HW} = 1` where :math:`R_X \ge 0`.
    * :math:`f_6` Eq. 16: :math:`a_{15}\min(Z_{TOR}/20, 1)`.
    * :math:`f_{10}` Eqs. 17-19: :math:`a(V_{S30})\ln[(Z_1 + 0.01)/(Z_{1,ref} + 0.01)]`
      (Z in km) with the slope :math:`a_{43}\ldots a_{46}` of the Vs30 classes
      (<= 200, 200-300, 300-500, > 500 m/s); :math:`Z_{1,ref}` from
      :meth:`reference_z1p0_km`.
    * Regional terms: Taiwan :math:`a_{31}\ln(V_{S30}^*/V_{LIN}) + a_{25} R_{RUP}`,
      China :math:`a_{28} R_{RUP}`, Japan :math:`f_{13}(V_{S30}) + a_{29} R_{RUP}`
      with :math:`f_{13}` = :math:`a_{36}\ldots a_{42}` of the Vs30 classes
      (< 200, 200-300, 300-400, 400-500, 500-700, 700-1000, >= 1000 m/s).

    Vs30-class coefficients (:math:`f_{10}` slope, :math:`f_{13}`) are applied
    piecewise-linearly in Vs30 between the class centres (150, 250, 400, 700 m/s;
    150, 250, 350, 450, 600, 850, 1150 m/s), constant outside, which keeps the
    median continuous in Vs30.

    Aleatory variability, Eqs. 20-30: :math:`\phi_A` from :math:`s_1, s_2`
    (measured or inferred Vs30) linear in M between 4 and 6, in Japan from
    :math:`s_5, s_6` linear in :math:`R_{RUP}` between 30 and 80 km;
    :math:`\tau_A` from :math:`s_3, s_4` linear in M between 5 and 7;
    :math:`\phi_B = \sqrt{\phi_A^2 - \phi_{amp}^2}` with :math:`\phi_{amp}` = 0.4;
    :math:`\partial = \partial\ln Amp/\partial\ln Sa_{1180}` = 0 for
    :math:`V_{S30} \ge V_{LIN}`, else :math:`-b Sa_{1180}/(Sa_{1180} + c)
    + b Sa_{1180}/(Sa_{1180} + c (V_{S30}/V_{LIN})^n)`;
    :math:`\phi = \sqrt{\phi_B^2 (1 + \partial)^2 + \phi_{amp}^2}`,
    :math:`\tau = \tau_A |1 + \partial|` (the paper's :math:`\tau_B (1 + \partial)`,
    whose square is what enters the variance), :math:`\sigma = \sqrt{\tau^2 + \phi^2}`.

    Regions: ``global`` and ``california`` (no regional term), ``japan``,
    ``china``, ``taiwan``; ``japan`` also uses the Japan :math:`Z_{1,ref}` (Eq. 19).

    References
    ----------
    Abrahamson, N.A., Silva, W.J. & Kamai, R. (2014). Summary of the ASK14 ground
    motion relation for active crustal regions. Earthquake Spectra 30(3), 1025-1055,
    doi:10.1193/070913EQS198M. Equation numbers are from memory (the paper's text
    was not at hand when this was written); the coefficients are the authors' table.
    """

    tectonic_regions = ("active_crustal",)
    basin_input = ("z1p0_km", "not given: the reference depth of the Vs30 relation, ASK14 Eqs. 18-19")
    name = "ASK14"
    reference = "Abrahamson, Silva & Kamai (2014), Earthquake Spectra 30(3), 1025-1055"
    coefficient_file = "abrahamson_silva_kamai_2014.csv"
    supported_regions = ("global", "california", "japan", "china", "taiwan")
    applicability = {
        "mag": {"strike_slip": (3.0, 8.5), "reverse": (3.0, 8.0), "normal": (3.0, 8.0)},
        "rrup_km": (0.0, 300.0),
        "vs30_mps": (180.0, 1000.0),
    }
    #: reference rock Vs30 of Sa1180 [m/s]
    VS30_ROCK_MPS: ClassVar[float] = 1180.0
    #: period-independent within-event site-amplification variability (Eq. 26)
    PHI_AMP: ClassVar[float] = 0.4
    #: hanging-wall constants (Eqs. 11-12)
    A2_HW: ClassVar[float] = 0.2
    H_HW: ClassVar[tuple[float, float, float]] = (0.25, 1.5, -0.75)
    #: class centres [m/s] of the basin slopes a43-a46 and of the Japan terms a36-a42
    BASIN_VS30_KNOTS: ClassVar[tuple[float, ...]] = (150.0, 250.0, 400.0, 700.0)
    JAPAN_VS30_KNOTS: ClassVar[tuple[float, ...]] = (150.0, 250.0, 350.0, 450.0, 600.0, 850.0, 1150.0)

    @staticmethod
    def default_width_km(mag, dip_deg) -> FloatArray:
        r"""Down-dip rupture width [km] where unknown.

        .. math:: W = \min\left(18/\sin\delta,\ 10^{-1.75 + 0.45 M}\right)

        The paper gives no width relation; this one is the NGA-West2 spreadsheet's
        as documented by the coefficient data source (pygmm ``calc_width``).
        """
        return np.minimum(
            18.0 / np.sin(np.radians(dip_deg)), 10.0 ** (-1.75 + 0.45 * np.asarray(mag))
        )

    @staticmethod
    def reference_z1p0_km(vs30_mps, region: str = "california") -> FloatArray:
        r"""Reference depth to the 1.0 km/s horizon [km] given Vs30, Eqs. 18-19.

        California and other regions (Eq. 18):
        :math:`Z_{1,ref} = \exp\{-\tfrac{7.67}{4}\ln[(V_{S30}^4 + 610^4)/(1360^4 + 610^4)]\}/1000`;
        Japan (Eq. 19):
        :math:`Z_{1,ref} = \exp\{-\tfrac{5.23}{2}\ln[(V_{S30}^2 + 412^2)/(1360^2 + 412^2)]\}/1000`.
        """
        vs30 = np.asarray(vs30_mps, dtype=np.float64)
        if region == "japan":
            power, v_knee, slope = 2.0, 412.0, -5.23 / 2.0
        else:
            power, v_knee, slope = 4.0, 610.0, -7.67 / 4.0
        ratio = (vs30**power + v_knee**power) / (1360.0**power + v_knee**power)
        return np.exp(slope * np.log(ratio)) / 1000.0

    def _v1(self, c) -> FloatArray:
        """V1 [m/s] of Eq. 8 per coefficient row."""
        period = c("period")
        mid = np.exp(-0.35 * np.log(np.clip(period, 0.5, 3.0) / 0.5) + math.log(1500.0))
        return np.where(period >= 3.0, 800.0, mid)

    def _vs30_terms(self, c, vs30, sa1180, region: str) -> FloatArray:
        """f5 (Eqs. 7-8) plus the Vs30-dependent regional terms [ln units]."""
        v_lin = c("v_lin")
        vs_star = np.minimum(vs30, self._v1(c))
        ln_ratio = np.log(vs_star / v_lin)
        linear = (c("a10") + c("b") * c("n")) * ln_ratio
        if sa1180 is None:  # reference rock: Vs30 = 1180 >= V_LIN for every period
            f5 = linear
        else:
            nonlinear = (
                c("a10") * ln_ratio
                - c("b") * np.log(sa1180 + c("c"))
                + c("b") * np.log(sa1180 + c("c") * (vs_star / v_lin) ** c("n"))
            )
            f5 = np.where(vs30 >= v_lin, linear, nonlinear)
        if region == "taiwan":
            f5 = f5 + c("a31") * ln_ratio
        elif region == "japan":
            weights = _hat_weights(vs30, self.JAPAN_VS30_KNOTS)
            f5 = f5 + sum(c(f"a{36 + i}") * w for i, w in enumerate(weights))
        return f5

    def _hanging_wall(self, c, mag, rx, rjb, ry0, ztor, dip, width) -> FloatArray:
        """F_HW f4 (Eqs. 9-15) [ln units]."""
        t1 = np.minimum(90.0 - dip, 60.0) / 45.0
        dm = mag - 6.5
        a2 = self.A2_HW
        t2 = np.where(
            mag >= 6.5, 1.0 + a2 * dm, np.where(mag > 5.5, 1.0 + a2 * dm - (1.0 - a2) * dm**2, 0.0)
        )
        r1 = width * np.cos(np.radians(dip))
        r2 = 3.0 * r1
        h1, h2, h3 = self.H_HW
        with np.errstate(divide="ignore", invalid="ignore"):
            x = rx / r1
            taper = 1.0 - (rx - r1) / (r2 - r1)
        t3 = np.where(rx < r1, h1 + h2 * x + h3 * x**2, np.where(rx <= r2, taper, 0.0))
        t4 = np.clip(1.0 - ztor**2 / 100.0, 0.0, 1.0)
        ry1 = rx * math.tan(math.radians(20.0))
        t5 = np.where(
            np.isnan(ry0),
            np.clip(1.0 - rjb / 30.0, 0.0, 1.0),
            np.clip(1.0 - (ry0 - ry1) / 5.0, 0.0, 1.0),
        )
        on_hw = (rx >= 0.0) & (t1 > 0.0)
        return np.where(on_hw, c("a13") * t1 * t2 * t3 * t4 * t5, 0.0)

    def _source_path_terms(self, inp, c, geo) -> FloatArray:
        """Every Vs30-independent term of Eq. 1 (f1, f4, f6, f7, f8, regional distance)."""
        mag, rrup, rjb, rx, ry0, ztor, dip, width, f_rv, f_n = geo
        m1, m2 = c("m1"), c("m2")
        c4m = c("c4") - (c("c4") - 1.0) * np.clip(5.0 - mag, 0.0, 1.0)
        ln_r = 0.5 * np.log(rrup**2 + c4m**2)
        m_lo = np.minimum(mag, m2)  # segment below M2 keeps the M2 values of the middle one
        f1 = (
            c("a1")
            + np.where(mag > m1, c("a5"), c("a4")) * (np.maximum(mag, m2) - m1)
            + c("a8") * (8.5 - np.maximum(mag, m2)) ** 2
            + (c("a2") + c("a3") * (np.maximum(mag, m2) - m1)) * ln_r
            + c("a17") * rrup
            + c("a6") * (m_lo - m2)
            + c("a7") * (m_lo - m2) ** 2
        )
        m_taper = np.clip(mag - 4.0, 0.0, 1.0)
        f78 = (c("a11") * f_rv + c("a12") * f_n) * m_taper
        f6 = c("a15") * np.clip(ztor / 20.0, 0.0, 1.0)
        f4 = self._hanging_wall(c, mag, rx, rjb, ry0, ztor, dip, width)
        region_rate = {"taiwan": "a25", "china": "a28", "japan": "a29"}.get(inp.region)
        regional = 0.0 if region_rate is None else c(region_rate) * rrup
        return f1 + f78 + f6 + f4 + regional

    def _basin_term(self, c, vs30, z1, region: str) -> FloatArray:
        """f10 (Eqs. 17-19) [ln units]; 0 where z1 is unknown (NaN)."""
        z1_ref = self.reference_z1p0_km(vs30, region)
        ln_ratio = np.log((np.where(np.isnan(z1), z1_ref, z1) + 0.01) / (z1_ref + 0.01))
        weights = _hat_weights(vs30, self.BASIN_VS30_KNOTS)
        slope = sum(c(f"a{43 + i}") * w for i, w in enumerate(weights))
        return slope * ln_ratio

    def _inputs(self, inp: GmmInput):
        name = self.name
        mag = inp.field("mag", name)
        dip = inp.field("dip_deg", name)
        rake = inp.field("rake_deg", name)
        if np.any(np.isnan(rake)):
            raise ValueError(
                f"{name}: 'rake_deg' must be given for every scenario (no unspecified "
                "mechanism term in this model); got NaN"
            )
        _, _, f_n, f_rv = mechanism_flags(rake)
        width = inp.optional_field("width_km")
        width_default = self.default_width_km(mag, dip)
        width = width_default if width is None else np.where(np.isnan(width), width_default, width)
        ry0 = inp.optional_field("ry0_km")
        ry0 = np.full(inp.shape, np.nan) if ry0 is None else ry0
        geo = (
            mag, inp.field("rrup_km", name), inp.field("rjb_km", name), inp.field("rx_km", name),
            ry0, inp.field("ztor_km", name), dip, width, f_rv, f_n,
        )
        z1 = inp.optional_field("z1p0_km")
        z1 = np.full(inp.shape, np.nan) if z1 is None else z1
        measured = inp.optional_field("vs30_measured")
        measured = np.zeros(inp.shape) if measured is None else measured
        return tuple(np.broadcast_to(a, inp.shape)[None] for a in geo), z1[None], measured[None]

    def _evaluate_rows(self, inp, rows):
        nd = len(inp.shape)
        c = lambda col: self._coeff(col, rows, nd)  # noqa: E731
        geo, z1, measured = self._inputs(inp)
        mag, rrup = geo[0], geo[1]
        vs30 = inp.field("vs30_mps", self.name)[None]
        base = self._source_path_terms(inp, c, geo)
        vs_rock = np.full((1,) * (nd + 1), self.VS30_ROCK_MPS)
        sa1180 = np.exp(base + self._vs30_terms(c, vs_rock, None, inp.region))
        ln_y = (
            base
            + self._vs30_terms(c, vs30, sa1180, inp.region)
            + self._basin_term(c, vs30, z1, inp.region)
        )

        # Aleatory variability, Eqs. 20-30.
        if inp.region == "japan":
            phi_a = c("s5") + (c("s6") - c("s5")) * np.clip((rrup - 30.0) / 50.0, 0.0, 1.0)
        else:
            m_w = np.clip((mag - 4.0) / 2.0, 0.0, 1.0)
            s1 = np.where(measured == 1.0, c("s1m"), c("s1e"))
            s2 = np.where(measured == 1.0, c("s2m"), c("s2e"))
            phi_a = s1 + (s2 - s1) * m_w
        tau_a = c("s3") + (c("s4") - c("s3")) * np.clip((mag - 5.0) / 2.0, 0.0, 1.0)
        phi_b = np.sqrt(np.maximum(phi_a**2 - self.PHI_AMP**2, 0.0))
        v_lin = c("v_lin")
        deriv = np.where(
            vs30 < v_lin,
            c("b") * sa1180 * (
                1.0 / (sa1180 + c("c") * (vs30 / v_lin) ** c("n")) - 1.0 / (sa1180 + c("c"))
            ),
            0.0,
        )
        tau = tau_a * np.abs(1.0 + deriv)
        phi = np.sqrt(phi_b**2 * (1.0 + deriv) ** 2 + self.PHI_AMP**2)
        sigma = np.sqrt(tau**2 + phi**2)
        out_shape = (rows.size,) + inp.shape
        return tuple(np.broadcast_to(a, out_shape).copy() for a in (ln_y, tau, phi, sigma))
