"""Chiou & Youngs (2014), Earthquake Spectra 30(3), 1117-1153, vectorised."""
from __future__ import annotations

from typing import ClassVar

import numpy as np

from quakefolio.core.gmm.base import FloatArray, GmmInput, VectorGmm, mean_z1p0_km

__all__ = ["Cy14"]


# --------------------------------------------------------------------------- #
# Chiou & Youngs (2014)
# --------------------------------------------------------------------------- #
class Cy14(VectorGmm):
    r"""Chiou & Youngs (2014) NGA-West2 model, vectorised.

    Uses ``mag``, ``rrup_km``, ``rjb_km``, ``rx_km``, ``ztor_km``, ``dip_deg``,
    ``rake_deg``, ``vs30_mps``; optional ``z1p0_km`` (``None`` or NaN: the model's
    own mean depth for the site's Vs30, Eqs. 1-2, so the basin term is 0),
    ``vs30_measured`` (``None``: inferred Vs30) and ``region``. The directivity
    parameter :math:`\Delta DPP` is 0 (the average over hypocentre positions).

    Notes
    -----
    Reference-rock median, Eq. 11 (ln units, y in g), with
    :math:`C_M = \cosh(2\max(M - 4.5, 0))`:

    .. math::
        \ln y_{ref} = c_1 + (c_{1a} + c_{1c}/C_M) F_{RV} + (c_{1b} + c_{1d}/C_M) F_{NM}
        + (c_7 + c_{7b}/C_M)\Delta Z_{TOR} + (c_{11} + c_{11b}/C_M)\cos^2\delta
        + c_2 (M - 6) + \frac{c_2 - c_3}{c_n}\ln(1 + e^{c_n (c_M - M)})
        + c_4 \ln(R_{RUP} + c_5\cosh[c_6 \max(M - c_{HM}, 0)])
        + (c_{4a} - c_4)\ln\sqrt{R_{RUP}^2 + c_{RB}^2}
        + \gamma_{reg}\{c_{\gamma 1} + c_{\gamma 2}/\cosh[\max(M - c_{\gamma 3}, 0)]\} R_{RUP}
        + c_9 F_{HW}\cos\delta\,[c_{9a} + (1 - c_{9a})\tanh(R_X/c_{9b})]
          \left[1 - \frac{\sqrt{R_{JB}^2 + Z_{TOR}^2}}{R_{RUP} + 1}\right]

    :math:`F_{RV} = 1` for 30 <= rake <= 150 and :math:`F_{NM} = 1` for
    -120 <= rake <= -60 (normal-oblique rakes count as strike-slip in this model);
    :math:`F_{HW} = 1` where :math:`R_X \ge 0`.
    :math:`\Delta Z_{TOR} = Z_{TOR} - E[Z_{TOR}]` with :math:`E[Z_{TOR}] =
    \max(2.704 - 1.226\max(M - 5.849, 0), 0)^2` for reverse faulting (Eq. 4) and
    :math:`\max(2.673 - 1.136\max(M - 4.970, 0), 0)^2` otherwise (Eq. 5).
    :math:`\gamma_{reg}` = :math:`\gamma_{JI}` for Japan and Italy with 6 < M < 6.9,
    :math:`\gamma_{C}` for China (Wenchuan), 1 otherwise.

    Site response, Eq. 12 (:math:`\eta` = 0):
    :math:`\ln y = \ln y_{ref} + \phi_1\min(\ln(V_{S30}/1130), 0)
    + \phi_2 (e^{\phi_3(\min(V_{S30}, 1130) - 360)} - e^{\phi_3 (1130 - 360)})
    \ln[(y_{ref} + \phi_4)/\phi_4] + \phi_5 (1 - e^{-\Delta Z_1/\phi_6})`,
    with :math:`\Delta Z_1 = Z_1 - E[Z_1](V_{S30})` in metres (Eq. 1 California,
    Eq. 2 Japan; :func:`quakefolio.core.gmm.mean_z1p0_km`); Japan uses
    :math:`\phi_{1JP}, \phi_{5JP}, \phi_{6JP}`.

    Aleatory variability, Eq. 13, with :math:`m = \min(\max(M, 5), 6.5) - 5`:
    :math:`\tau_1 + (\tau_2 - \tau_1) m/1.5`; :math:`NL_0 = \phi_2 (e^{\ldots} - e^{\ldots})
    y_{ref}/(y_{ref} + \phi_4)`; :math:`\sigma_{NL_0} = [\sigma_1 + (\sigma_2 - \sigma_1) m/1.5]
    \sqrt{\sigma_3 F_{Inferred} + 0.7 F_{Measured} + (1 + NL_0)^2}`
    (:math:`\sigma_{2JP}` in Japan); between-event :math:`\tau = (1 + NL_0)\tau_{(M)}`,
    within-event :math:`\phi = \sigma_{NL_0}`, :math:`\sigma = \sqrt{\tau^2 + \phi^2}`.

    Regions: ``global`` and ``california`` (the California model), ``japan``
    (Japan site, basin and variability terms, :math:`\gamma_{JI}`), ``italy``
    (:math:`\gamma_{JI}`), ``china`` (:math:`\gamma_C`).

    References
    ----------
    Chiou, B.S.-J. & Youngs, R.R. (2014). Update of the Chiou and Youngs NGA model
    for the average horizontal component of peak ground motion and response
    spectra. Earthquake Spectra 30(3), 1117-1153, doi:10.1193/072813EQS219M.
    Equation numbers are from memory (the paper's text was not at hand when this
    was written); the coefficients are the authors' table (NGA-West2 spreadsheet v5.7).
    """

    tectonic_regions = ("active_crustal",)
    basin_input = ("z1p0_km", "not given: no basin term (z1p0_km taken as the mean depth of the Vs30 relation, CY14 Eqs. 1-2)")
    name = "CY14"
    reference = "Chiou & Youngs (2014), Earthquake Spectra 30(3), 1117-1153"
    coefficient_file = "chiou_youngs_2014.csv"
    supported_regions = ("global", "california", "japan", "italy", "china")
    applicability = {
        "mag": {"strike_slip": (3.5, 8.5), "reverse": (3.5, 8.0), "normal": (3.5, 8.0)},
        "rrup_km": (0.0, 300.0),
        "vs30_mps": (180.0, 1500.0),
        "ztor_km": (0.0, 20.0),
        "dip_deg": (15.0, 90.0),
    }
    #: reference Vs30 of y_ref [m/s] (Eq. 12)
    VS30_REF_MPS: ClassVar[float] = 1130.0

    @staticmethod
    def mechanism_flags(rake_deg) -> tuple[FloatArray, FloatArray]:
        """``(F_RV, F_NM)``: reverse for 30 <= rake <= 150, normal for -120 <= rake <= -60."""
        rake = np.asarray(rake_deg, dtype=np.float64)
        f_rv = ((rake >= 30.0) & (rake <= 150.0)).astype(np.float64)
        f_nm = ((rake >= -120.0) & (rake <= -60.0)).astype(np.float64)
        return f_rv, f_nm

    @staticmethod
    def mean_ztor_km(mag, reverse) -> FloatArray:
        """E[Ztor] [km] given M and the reverse flag, Eqs. 4-5."""
        mag = np.asarray(mag, dtype=np.float64)
        rs = np.maximum(2.704 - 1.226 * np.maximum(mag - 5.849, 0.0), 0.0) ** 2
        other = np.maximum(2.673 - 1.136 * np.maximum(mag - 4.970, 0.0), 0.0) ** 2
        return np.where(np.asarray(reverse) > 0.0, rs, other)

    def _ln_y_ref(self, inp: GmmInput, c, geo) -> FloatArray:
        """Eq. 11: ln median on the 1130 m/s reference rock, shape (k, *shape)."""
        mag, rrup, rjb, rx, ztor, dip, f_rv, f_nm = geo
        cosh_m = np.cosh(2.0 * np.maximum(mag - 4.5, 0.0))
        cos_d = np.cos(np.radians(dip))
        ln_y = (
            c("c_1")
            + (c("c_1a") + c("c_1c") / cosh_m) * f_rv
            + (c("c_1b") + c("c_1d") / cosh_m) * f_nm
            + (c("c_7") + c("c_7b") / cosh_m) * (ztor - self.mean_ztor_km(mag, f_rv))
            + (c("c_11") + c("c_11b") / cosh_m) * cos_d**2
            + c("c_2") * (mag - 6.0)
            + (c("c_2") - c("c_3")) / c("c_n") * np.logaddexp(0.0, c("c_n") * (c("c_M") - mag))
            + c("c_4") * np.log(rrup + c("c_5") * np.cosh(c("c_6") * np.maximum(mag - c("c_HM"), 0.0)))
            + (c("c_4a") - c("c_4")) * 0.5 * np.log(rrup**2 + c("c_RB") ** 2)
        )
        if inp.region in ("japan", "italy"):
            scale = np.where((mag > 6.0) & (mag < 6.9), c("gamma_ji"), 1.0)
        elif inp.region == "china":
            scale = c("gamma_c")
        else:
            scale = 1.0
        gamma = c("c_gamma1") + c("c_gamma2") / np.cosh(np.maximum(mag - c("c_gamma3"), 0.0))
        ln_y = ln_y + scale * gamma * rrup
        hanging_wall = (
            c("c_9")
            * cos_d
            * (c("c_9a") + (1.0 - c("c_9a")) * np.tanh(rx / c("c_9b")))
            * (1.0 - np.sqrt(rjb**2 + ztor**2) / (rrup + 1.0))
        )
        return ln_y + np.where(rx >= 0.0, hanging_wall, 0.0)

    def _evaluate_rows(self, inp, rows):
        name = self.name
        shape = inp.shape
        nd = len(shape)
        c = lambda col: self._coeff(col.lower(), rows, nd)  # noqa: E731
        rake = inp.field("rake_deg", name)
        if np.any(np.isnan(rake)):
            raise ValueError(
                f"{name}: 'rake_deg' must be given for every scenario (no unspecified "
                "mechanism term in this model); got NaN"
            )
        f_rv, f_nm = self.mechanism_flags(rake)
        geo = tuple(
            np.broadcast_to(a, shape)[None]
            for a in (
                inp.field("mag", name), inp.field("rrup_km", name), inp.field("rjb_km", name),
                inp.field("rx_km", name), inp.field("ztor_km", name), inp.field("dip_deg", name),
                f_rv, f_nm,
            )
        )
        mag = geo[0]
        vs30 = inp.field("vs30_mps", name)[None]
        japan = inp.region == "japan"
        suffix = "jp" if japan else ""
        y_ref = np.exp(self._ln_y_ref(inp, c, geo))

        # Site response, Eq. 12.
        mean_z1 = mean_z1p0_km(vs30, "japan" if japan else "california")
        z1 = inp.optional_field("z1p0_km")
        dz1_m = 0.0 if z1 is None else 1000.0 * np.where(np.isnan(z1[None]), 0.0, z1[None] - mean_z1)
        vs_ref = self.VS30_REF_MPS
        nl_slope = c("phi_2") * (
            np.exp(c("phi_3") * (np.minimum(vs30, vs_ref) - 360.0))
            - np.exp(c("phi_3") * (vs_ref - 360.0))
        )
        ln_y = (
            np.log(y_ref)
            + c("phi_1" + suffix) * np.minimum(np.log(vs30 / vs_ref), 0.0)
            + nl_slope * np.log((y_ref + c("phi_4")) / c("phi_4"))
            + c("phi_5" + suffix) * (1.0 - np.exp(-dz1_m / c("phi_6" + suffix)))
        )

        # Aleatory variability, Eq. 13.
        m = (np.clip(mag, 5.0, 6.5) - 5.0) / 1.5
        tau_m = c("tau_1") + (c("tau_2") - c("tau_1")) * m
        nl0 = nl_slope * y_ref / (y_ref + c("phi_4"))
        measured = inp.optional_field("vs30_measured")
        measured = 0.0 if measured is None else measured[None]
        sigma_m = c("sigma_1") + (c("sigma_2" + suffix) - c("sigma_1")) * m
        phi = sigma_m * np.sqrt(
            c("sigma_3") * (1.0 - measured) + 0.7 * measured + (1.0 + nl0) ** 2
        )
        tau = (1.0 + nl0) * tau_m
        sigma = np.sqrt(tau**2 + phi**2)
        out_shape = (rows.size,) + shape
        return tuple(np.broadcast_to(a, out_shape).copy() for a in (ln_y, tau, phi, sigma))
