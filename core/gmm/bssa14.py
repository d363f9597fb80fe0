"""Boore, Stewart, Seyhan & Atkinson (2014), Earthquake Spectra 30(3), 1057-1085, vectorised."""
from __future__ import annotations

from typing import ClassVar

import numpy as np
from numpy.typing import NDArray

from quakefolio.core.gmm.base import FloatArray, GmmInput, VectorGmm, mean_z1p0_km, mechanism_flags

__all__ = ["Bssa14"]


# --------------------------------------------------------------------------- #
# Boore, Stewart, Seyhan & Atkinson (2014)
# --------------------------------------------------------------------------- #
class Bssa14(VectorGmm):
    r"""Boore, Stewart, Seyhan & Atkinson (2014) NGA-West2 model, vectorised.

    Uses ``mag``, ``rjb_km``, ``vs30_mps``; optional ``rake_deg`` (``None``
    or NaN: unspecified mechanism), ``z1p0_km`` and ``region``.

    Notes
    -----
    Median (Eq. 1), all terms in ln units with Y in g:

    * Event term, Eq. 2:
      :math:`F_E = e_0 U + e_1 SS + e_2 NS + e_3 RS + e_4 (M-M_h) + e_5 (M-M_h)^2`
      for :math:`M \le M_h`; :math:`\ldots + e_6 (M-M_h)` for :math:`M > M_h`.
    * Path term, Eqs. 3-4:
      :math:`F_P = [c_1 + c_2 (M-M_{ref})]\ln(R/R_{ref}) + (c_3 + \Delta c_3)(R-R_{ref})`,
      :math:`R = \sqrt{R_{JB}^2 + h^2}`; :math:`\Delta c_3` by region.
    * Site term, Eqs. 5-8: :math:`F_S = \ln F_{lin} + \ln F_{nl} + F_{\delta z1}`;
      :math:`\ln F_{lin} = c \ln(\min(V_{S30}, V_c)/V_{ref})` (Eq. 6);
      :math:`\ln F_{nl} = f_1 + f_2 \ln((PGA_r + f_3)/f_3)` (Eq. 7) with
      :math:`f_2 = f_4[\exp\{f_5(\min(V_{S30}, V_{ref}) - 360)\} - \exp\{f_5(V_{ref} - 360)\}]`
      (Eq. 8); :math:`PGA_r` is the median PGA for :math:`V_{ref} = 760` m/s,
      i.e. :math:`\exp(F_E + F_P)` of the PGA row.
    * Basin term, Eqs. 9-12: for T >= 0.65 s,
      :math:`F_{\delta z1} = \min(f_6 \delta z_1, f_7)` with
      :math:`\delta z_1 = z_1 - \mu_{z1}(V_{S30})` (Eq. 10, Eqs. 11-12 for
      :math:`\mu_{z1}`); 0 for shorter periods and when z1 is unknown.

    Aleatory variability, Eqs. 13-17: :math:`\tau(M)` and :math:`\phi(M)` are
    linear in M between 4.5 and 5.5 (Eqs. 14-15); :math:`\phi` increases by
    :math:`\Delta\phi_R` linearly in :math:`\ln R_{JB}` between :math:`R_1` and
    :math:`R_2` (Eq. 16) and decreases by :math:`\Delta\phi_V` linearly in
    :math:`\ln V_{S30}` between :math:`V_2` and :math:`V_1` (Eq. 17);
    :math:`\sigma = \sqrt{\phi^2 + \tau^2}` (Eq. 13).

    Regions: ``global``, ``california``, ``taiwan``, ``new_zealand`` use the
    global anelastic term; ``china``, ``turkey`` and ``italy``, ``japan`` their
    regional :math:`\Delta c_3`; ``japan`` uses the Japan :math:`\mu_{z1}`.

    References
    ----------
    Boore, D.M., Stewart, J.P., Seyhan, E. & Atkinson, G.M. (2014). NGA-West2
    equations for predicting PGA, PGV, and 5% damped PSA for shallow crustal
    earthquakes. Earthquake Spectra 30(3), 1057-1085.
    """

    name = "BSSA14"
    reference = (
        "Boore, Stewart, Seyhan & Atkinson (2014), Earthquake Spectra 30(3), 1057-1085"
    )
    coefficient_file = "boore_stewart_seyhan_atkinson-2014.csv"
    tectonic_regions = ("active_crustal",)
    basin_input = ("z1p0_km", "not given: no basin term (z1p0_km taken as the mean depth of the Vs30 relation, BSSA14 Eqs. 11-12)")
    supported_regions = (
        "global",
        "california",
        "taiwan",
        "new_zealand",
        "china",
        "turkey",
        "italy",
        "japan",
    )
    applicability = {
        "mag": {"strike_slip": (3.0, 8.5), "reverse": (3.0, 8.5), "normal": (3.0, 7.0)},
        "rjb_km": (0.0, 400.0),
        "vs30_mps": (150.0, 1500.0),
    }
    _DC3_COLUMN: ClassVar[dict[str, str]] = {
        "global": "dc_3global",
        "california": "dc_3global",
        "taiwan": "dc_3global",
        "new_zealand": "dc_3global",
        "china": "dc_3ct",
        "turkey": "dc_3ct",
        "italy": "dc_3ij",
        "japan": "dc_3ij",
    }
    #: shortest period [s] with a basin-depth term (Eq. 9)
    BASIN_MIN_PERIOD_S: ClassVar[float] = 0.65

    def _reference_terms(
        self, inp: GmmInput, rows: NDArray[np.intp], mag, rjb, flags
    ) -> FloatArray:
        """Event plus path term, F_E + F_P (Eqs. 2-4) [ln g], shape (k, *shape)."""
        nd = len(inp.shape)
        c = lambda name: self._coeff(name, rows, nd)  # noqa: E731
        unspecified, strike_slip, normal, reverse = flags
        dm = mag - c("M_h")
        event = (
            c("e_0") * unspecified
            + c("e_1") * strike_slip
            + c("e_2") * normal
            + c("e_3") * reverse
            + np.where(dm <= 0.0, c("e_4") * dm + c("e_5") * dm**2, c("e_6") * dm)
        )
        r = np.sqrt(rjb**2 + c("h") ** 2)
        dc3 = c(self._DC3_COLUMN[inp.region])
        path = (c("c_1") + c("c_2") * (mag - c("M_ref"))) * np.log(r / c("R_ref")) + (
            c("c_3") + dc3
        ) * (r - c("R_ref"))
        return event + path

    def _evaluate_rows(self, inp, rows):
        # fields as given (not broadcast): terms of the rupture alone are computed once per
        # rupture, of the site alone once per site, where the input is a (site, rupture) grid
        mag = inp.compact_field("mag", self.name)[None]
        rjb = inp.compact_field("rjb_km", self.name)[None]
        vs30 = inp.compact_field("vs30_mps", self.name)[None]
        rake = None if inp.rake_deg is None else inp.compact_field("rake_deg", self.name)
        if rake is None:  # no rake given: unspecified mechanism (e_0 term of Eq. 2)
            rake = np.full((1,) * len(inp.shape), np.nan)
        flags = mechanism_flags(rake[None])
        nd = len(inp.shape)
        c = lambda name: self._coeff(name, rows, nd)  # noqa: E731

        # PGA on the 760 m/s reference condition (Eq. 7 definition of PGA_r).
        pga_row = np.array([self._pga_row], dtype=np.intp)
        pga_terms = self._reference_terms(inp, pga_row, mag, rjb, flags)
        pga_r = np.exp(pga_terms)

        # the same terms for the requested rows (computed once when only PGA is asked)
        only_pga = np.array_equal(rows, pga_row)
        ln_y = pga_terms if only_pga else self._reference_terms(inp, rows, mag, rjb, flags)

        # Linear site term, Eq. 6.
        ln_flin = c("c") * np.log(np.minimum(vs30, c("V_c")) / c("V_ref"))
        # Nonlinear site term, Eqs. 7-8.
        f2 = c("f_4") * (
            np.exp(c("f_5") * (np.minimum(vs30, c("V_ref")) - 360.0))
            - np.exp(c("f_5") * (c("V_ref") - 360.0))
        )
        ln_fnl = c("f_1") + f2 * np.log((pga_r + c("f_3")) / c("f_3"))
        ln_y = ln_y + ln_flin + ln_fnl

        # Basin-depth term, Eqs. 9-12.
        z1 = None if inp.z1p0_km is None else inp.compact_field("z1p0_km", self.name)
        if z1 is not None:
            mu_z1 = mean_z1p0_km(vs30, inp.region)
            dz1 = np.where(np.isnan(z1[None]), 0.0, z1[None] - mu_z1)
            has_basin = c("period") >= self.BASIN_MIN_PERIOD_S
            f_dz1 = np.where(has_basin, np.minimum(c("f_6") * dz1, c("f_7")), 0.0)
            ln_y = ln_y + f_dz1

        # Aleatory variability, Eqs. 13-17.
        m_weight = np.clip(mag - 4.5, 0.0, 1.0)
        tau = c("tau_1") + (c("tau_2") - c("tau_1")) * m_weight
        phi = c("phi_1") + (c("phi_2") - c("phi_1")) * m_weight
        with np.errstate(divide="ignore"):
            r_weight = np.log(rjb / c("R_1")) / np.log(c("R_2") / c("R_1"))
        phi = phi + c("dphi_R") * np.clip(r_weight, 0.0, 1.0)
        v_weight = np.log(c("V_2") / vs30) / np.log(c("V_2") / c("V_1"))
        phi = phi - c("dphi_V") * np.clip(v_weight, 0.0, 1.0)
        sigma = np.sqrt(phi**2 + tau**2)

        shape = (len(rows),) + inp.shape
        full = lambda a: a if a.shape == shape else np.broadcast_to(a, shape).copy()  # noqa: E731
        return full(ln_y), full(tau), full(phi), full(sigma)
