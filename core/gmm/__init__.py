r"""Vectorised ground-motion models (GMMs): active crustal (NGA-West2), subduction and stable-continental.

Every model evaluates the natural-log median of an intensity measure (IM) and
its aleatory variability for many rupture-site scenarios at once. Scenario
parameters are passed as a structure of arrays (:class:`GmmInput`) whose fields
broadcast against one another; results come back as arrays of shape
``(n_ims, *scenario_shape)`` (:class:`GmmResult`).

Intensity measures are named ``PGA`` or ``SA_<period in s>`` (``SA_0.2``,
``SA_1.0``); values are in g, medians are returned as ``ln(g)``.

Coefficient tables are read from the data files shipped inside the installed
``pygmm`` package (never copied into this repository), with the standard
``csv`` module into numpy arrays, once per model; this module does no other
file I/O and does not import pygmm itself.

Models
------
``BSSA14``
    Boore, Stewart, Seyhan & Atkinson (2014), Earthquake Spectra 30(3),
    1057-1085, doi:10.1193/070113EQS184M.
``CB14``
    Campbell & Bozorgnia (2014), Earthquake Spectra 30(3), 1087-1115,
    doi:10.1193/062913EQS175M.
``ASK14``
    Abrahamson, Silva & Kamai (2014), Earthquake Spectra 30(3), 1025-1055,
    doi:10.1193/070913EQS198M.
``CY14``
    Chiou & Youngs (2014), Earthquake Spectra 30(3), 1117-1153,
    doi:10.1193/072813EQS219M.
``I14``
    Idriss (2014), Earthquake Spectra 30(3), 1155-1177,
    doi:10.1193/070613EQS195M.
``AG16``
    Abrahamson, Gregor & Addo (2016), Earthquake Spectra 32(1), 23-44,
    doi:10.1193/051712EQS188MR; subduction interface and intraslab events
    (event type per scenario: ``GmmInput.intraslab``).
``PZT11``
    Pezeshk, Zandieh & Tavakoli (2011), Bulletin of the Seismological Society
    of America 101(4), 1859-1870, doi:10.1785/0120100144; stable continental
    regions, hard rock (no site term), total sigma only.

Each crustal model needs only the scenario fields it names; the rupture geometry of the
hazard engine (``quakefolio.core.hazard``) gives all of them (Rrup, Rjb, Rx,
Ry0, Ztor, hypocentral depth, dip, rake, width). Basin depths and the
measured-Vs30 flag are optional: where unknown, each model uses its own default
(a mean depth for the site's Vs30, inferred Vs30).

Tectonic regions
----------------
Each model lists the tectonic regions it is for in ``tectonic_regions``
(names from :data:`TECTONIC_REGIONS`): ``active_crustal`` (BSSA14, CB14, ASK14, CY14, I14),
``subduction_interface`` and ``subduction_intraslab`` (AG16),
``stable_continental`` (PZT11); :func:`models_for_region` lists them by region.

Spectral periods between tabulated periods
------------------------------------------
For ``SA_T`` with ``T`` not in a model's table, the ln median, tau, phi and
total sigma are each interpolated linearly in ``ln(T)`` between the two
bracketing tabulated periods (a local power law in period for the median).
``sigma**2 == tau**2 + phi**2`` therefore holds exactly only at tabulated
periods. A period outside the tabulated range raises ``ValueError``.

Verification
------------
Every model is checked against pygmm's scalar implementations to 1e-6 in ln
units (``tests/test_gmm_oracle.py`` for BSSA14 and CB14,
``tests/test_gmm_oracle_nga.py`` for ASK14, CY14 and I14,
``tests/test_gmm_oracle_regions.py`` for AG16 and PZT11); the places where that
package departs from the papers, and how the comparison handles them, are listed
there.
"""
from __future__ import annotations

from quakefolio.core.gmm.ag16 import Ag16
from quakefolio.core.gmm.base import (
    TECTONIC_REGIONS, GmmInput, GmmResult, VectorGmm, im_period_s, mean_z1p0_km, mean_z2p5_km,
    mechanism_flags,
)
from quakefolio.core.gmm.ask14 import Ask14
from quakefolio.core.gmm.bssa14 import Bssa14
from quakefolio.core.gmm.cb14 import Cb14
from quakefolio.core.gmm.pzt11 import Pzt11
from quakefolio.core.gmm.cy14 import Cy14
from quakefolio.core.gmm.i14 import I14

__all__ = [
    "GmmInput",
    "GmmResult",
    "VectorGmm",
    "Ask14",
    "Bssa14",
    "Cb14",
    "Ag16",
    "Pzt11",
    "Cy14",
    "I14",
    "GMM_REGISTRY",
    "TECTONIC_REGIONS",
    "get_gmm",
    "models_for_region",
    "im_period_s",
    "mechanism_flags",
    "mean_z1p0_km",
    "mean_z2p5_km",
]


# --------------------------------------------------------------------------- #
# Registry
# --------------------------------------------------------------------------- #
GMM_REGISTRY: dict[str, VectorGmm] = {
    "BSSA14": Bssa14(),
    "CB14": Cb14(),
    "ASK14": Ask14(),
    "CY14": Cy14(),
    "I14": I14(),
    "AG16": Ag16(),
    "PZT11": Pzt11(),
}


def models_for_region(tectonic_region: str) -> tuple[str, ...]:
    """Registry names of the models for one tectonic region, in registry order.

    Parameters
    ----------
    tectonic_region : str
        One of :data:`TECTONIC_REGIONS`.

    Returns
    -------
    tuple of str

    Raises
    ------
    ValueError
        If the region is not one of :data:`TECTONIC_REGIONS`.
    """
    if tectonic_region not in TECTONIC_REGIONS:
        raise ValueError(
            f"unknown tectonic region {tectonic_region!r}; valid: " + ", ".join(TECTONIC_REGIONS)
        )
    return tuple(n for n, m in GMM_REGISTRY.items() if tectonic_region in m.tectonic_regions)


def get_gmm(name: str) -> VectorGmm:
    """Ground-motion model registered under ``name``.

    Raises
    ------
    ValueError
        If ``name`` is not registered; the message lists the valid names.
    """
    try:
        return GMM_REGISTRY[name]
    except (KeyError, TypeError):
        raise ValueError(
            f"unknown ground-motion model {name!r}; valid names: " + ", ".join(sorted(GMM_REGISTRY))
        ) from None
