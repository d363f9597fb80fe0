r"""Build the invented demo scenario of quakefolio: the city of Orvanel on Tessivane Island.

Every number written by this script is invented for demonstration: the island, the city,
its districts, the two faults and the background seismicity, the attenuation coefficients,
the hazard sites and their curves, the assets with their values, occupants and policy terms,
and the fragility and consequence parameters. They describe no real place, building, company,
person or dataset. The island is placed in open South Pacific water (lon -141.0..-140.4,
lat -35.3..-34.8) precisely so that no real place is implied.

Run ``python demo_portfolio/build_inputs.py``. The generator is seeded and writes, next to
this file:

- ``hazard_curves.csv`` and ``hazard_curves.parquet``: mean hazard curves (long form) on a
  9 x 9 grid of sites, for PGA, SA_0.3 and SA_1.0 at 40 levels [g];
- ``exposure.csv``: the invented building portfolio;
- ``group_terms.csv``: invented per-event deductible and limit of each account (``terms_group``);
- ``fragility_library.toml``: the invented fragility and consequence library.

Re-running it reproduces the files byte for byte (same numpy and pyarrow versions).

Hazard method
-------------
The curves are computed, not drawn: the annual rate of exceeding level :math:`y` at a site is

.. math:: \lambda(Y > y) = \sum_{s} \sum_{p} \sum_{m} \nu_{s,p,m}\,
          P\!\left(\ln Y > \ln y \mid m, R_{p}\right)

over sources :math:`s` (two faults discretised along their traces into points, and a
gridded background zone), points :math:`p` and magnitude bins :math:`m`, with
:math:`\nu` the annual rate of the bin per point (Cornell 1968, discretised). Magnitudes
follow a doubly truncated Gutenberg-Richter law in bins of 0.1. The invented attenuation is

.. math:: \ln Y = c_0 + c_1 M - c_2 \ln(R + c_3) + c_4 \ln(V_{S30} / 760)

with :math:`R` the hypocentral distance [km] and an untruncated lognormal residual of
standard deviation :math:`\sigma`.

References
----------
Cornell, C. A. (1968). Engineering seismic risk analysis. Bull. Seismol. Soc. Am. 58(5),
1583-1606.
Gutenberg, B. & Richter, C. F. (1944). Frequency of earthquakes in California. Bull. Seismol.
Soc. Am. 34(4), 185-188.
"""
from __future__ import annotations

import json
import math
import pathlib
import tomllib

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

OUT_DIR = pathlib.Path(__file__).resolve().parent
SEED = 41_703  # invented; any fixed value gives a reproducible portfolio

# The retrofit option of the what-if demo, appended to the generated library unchanged
# (invented numbers: a strengthened MAS-UR, higher medians, same consequences).
RETROFIT_CLASS_TOML = """# Retrofit option for the what-if demo ([[scenario.alternatives]] in quakefolio.toml), added by
# hand after the generated classes. Every number is invented to illustrate a strengthened
# MAS-UR building (higher medians, same consequences); not taken from any study.
[classes.MAS-UR-RF]
description = "Unreinforced masonry after an invented seismic retrofit, 1-3 storeys (invented parameters)"
im = "PGA"
collapse_state = "collapse"

[[classes.MAS-UR-RF.states]]
name = "cosmetic"
median = 0.12  # g (PGA)
beta = 0.68
mean_damage_ratio = 0.03
cov = 0.8
downtime_days = 5
casualty_rate = 0.0
contents_damage_ratio = 0.01

[[classes.MAS-UR-RF.states]]
name = "repairable"
median = 0.27  # g (PGA)
beta = 0.7
mean_damage_ratio = 0.18
cov = 0.55
downtime_days = 60
casualty_rate = 0.0005
contents_damage_ratio = 0.08

[[classes.MAS-UR-RF.states]]
name = "irreparable"
median = 0.65  # g (PGA)
beta = 0.7
mean_damage_ratio = 0.65
cov = 0.3
downtime_days = 300
casualty_rate = 0.012
contents_damage_ratio = 0.35

[[classes.MAS-UR-RF.states]]
name = "collapse"
median = 1.15  # g (PGA)
beta = 0.7
mean_damage_ratio = 1.0
downtime_days = 540
casualty_rate = 0.15
contents_damage_ratio = 0.8
"""

# --------------------------------------------------------------------------------------
# Geography (invented). Local planar coordinates x (east) and y (north) in km around the
# city centre; adequate over the ~100 km extent used here.
# --------------------------------------------------------------------------------------
ISLAND_NAME = "Tessivane Island"
CITY_NAME = "Orvanel"
ORIGIN_LON, ORIGIN_LAT = -140.70, -35.05
EARTH_RADIUS_KM = 6371.0
KM_PER_DEG_LAT = EARTH_RADIUS_KM * math.pi / 180.0
KM_PER_DEG_LON = KM_PER_DEG_LAT * math.cos(math.radians(ORIGIN_LAT))

GRID_N = 9              # sites per side
GRID_SPACING_KM = 2.5   # -> the grid spans 20 km x 20 km

# Coastline: a straight line y = COAST_Y0 + COAST_SLOPE * x; land lies north-west of it.
COAST_Y0_KM, COAST_SLOPE = -12.0, 0.28

MAX_ASSET_TO_SITE_KM = 3.0


def to_lonlat(x_km, y_km):
    """Local planar coordinates [km] -> (lon, lat) [deg]."""
    return (ORIGIN_LON + np.asarray(x_km) / KM_PER_DEG_LON,
            ORIGIN_LAT + np.asarray(y_km) / KM_PER_DEG_LAT)


def to_xy(lon, lat):
    """(lon, lat) [deg] -> local planar coordinates [km]."""
    return ((np.asarray(lon) - ORIGIN_LON) * KM_PER_DEG_LON,
            (np.asarray(lat) - ORIGIN_LAT) * KM_PER_DEG_LAT)


def great_circle_km(lon1, lat1, lon2, lat2):
    """Haversine distance [km] between points given in degrees (broadcasting)."""
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dp, dl = p2 - p1, np.radians(np.asarray(lon2) - np.asarray(lon1))
    h = np.sin(dp / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dl / 2) ** 2
    return 2.0 * EARTH_RADIUS_KM * np.arcsin(np.sqrt(h))


def coast_distance_km(x_km, y_km):
    """Signed distance [km] to the invented coastline, positive on land."""
    return (np.asarray(y_km) - COAST_Y0_KM - COAST_SLOPE * np.asarray(x_km)) / math.hypot(1.0, COAST_SLOPE)


def vs30_field(x_km, y_km):
    """Invented smooth Vs30 map [m/s]: soft coastal sediments, stiffening inland and on the
    Harnmere Rise hills in the north-west; 190 m/s at the coast and offshore."""
    d = np.maximum(coast_distance_km(x_km, y_km), 0.0)
    hills = 160.0 * np.exp(-((np.asarray(x_km) + 6.0) ** 2 + (np.asarray(y_km) - 6.0) ** 2) / 30.0)
    v = 190.0 + 420.0 * (1.0 - np.exp(-d / 7.0)) + hills
    return np.clip(v, 180.0, 760.0)


# --------------------------------------------------------------------------------------
# Seismicity (invented)
# --------------------------------------------------------------------------------------
MAG_BIN = 0.1

FAULTS = (
    {   # offshore, parallel to the coast, passing about 2 km from the south-east corner
        "source_id": "quarnel_fault",
        "trace_km": ((-25.0, -22.0), (25.0, -8.0)),
        "depth_km": 7.0,
        "rate_above_mmin": 0.050,
        "b_value": 1.0,
        "mmin": 5.0,
        "mmax": 7.0,
    },
    {   # inland, crossing the north-west of the city under the Harnmere Rise
        "source_id": "harnmere_fault",
        "trace_km": ((-24.0, 20.0), (-2.0, 6.0)),
        "depth_km": 6.0,
        "rate_above_mmin": 0.045,
        "b_value": 1.0,
        "mmin": 5.0,
        "mmax": 6.7,
    },
)
FAULT_POINT_SPACING_KM = 1.0

BACKGROUND = {
    "source_id": "tessivane_background",
    "half_width_km": 100.0,  # square zone of 200 km x 200 km centred on the city
    "spacing_km": 10.0,
    "depth_km": 10.0,
    "rate_above_mmin": 0.35,
    "b_value": 1.0,
    "mmin": 4.5,
    "mmax": 6.5,
}

# Invented attenuation: ln Y[g] = c0 + c1 M - c2 ln(R + c3) + c4 ln(vs30 / 760), sigma.
ATTENUATION = {
    "PGA":    {"c0": -1.72, "c1": 0.50, "c2": 1.30, "c3": 4.0, "c4": -0.45, "sigma": 0.60},
    "SA_0.3": {"c0": -0.44, "c1": 0.40, "c2": 1.25, "c3": 4.0, "c4": -0.30, "sigma": 0.60},
    "SA_1.0": {"c0": -3.99, "c1": 0.70, "c2": 1.10, "c3": 4.0, "c4": -0.70, "sigma": 0.65},
}
IMS = tuple(ATTENUATION)

N_LEVELS = 40
LEVEL_FORMAT, RATE_FORMAT = "%.6g", "%.9e"
LEVEL_MIN_G, LEVEL_MAX_G = 5.0e-4, 4.0


def gutenberg_richter_bins(rate_above_mmin, b_value, mmin, mmax, bin_width=MAG_BIN):
    """Bin centres and annual rates of a doubly truncated Gutenberg-Richter law.

    The rate of magnitudes in [m1, m2) is
    N(mmin) * (10**(-b (m1 - mmin)) - 10**(-b (m2 - mmin))) / (1 - 10**(-b (mmax - mmin))).
    """
    n_bins = int(round((mmax - mmin) / bin_width))
    edges = mmin + bin_width * np.arange(n_bins + 1)
    cum = 10.0 ** (-b_value * (edges - mmin))
    rates = rate_above_mmin * (cum[:-1] - cum[1:]) / (1.0 - cum[-1])
    return 0.5 * (edges[:-1] + edges[1:]), rates


def fault_points(trace_km, spacing_km):
    """Midpoints [km] of equal pieces (no longer than ``spacing_km``) of a straight trace."""
    (x0, y0), (x1, y1) = trace_km
    n = max(1, math.ceil(math.hypot(x1 - x0, y1 - y0) / spacing_km))
    t = (np.arange(n) + 0.5) / n
    return np.column_stack([x0 + t * (x1 - x0), y0 + t * (y1 - y0)])


def background_points(half_width_km, spacing_km):
    """Cell centres [km] of a square gridded zone."""
    n = int(round(2 * half_width_km / spacing_km))
    c = -half_width_km + spacing_km * (np.arange(n) + 0.5)
    gx, gy = np.meshgrid(c, c, indexing="xy")
    return np.column_stack([gx.ravel(), gy.ravel()])


def point_sources():
    """All point sources as (source_id, points [km], depth [km], magnitudes, rate per point
    per magnitude bin [1/yr])."""
    out = []
    for f in FAULTS:
        pts = fault_points(f["trace_km"], FAULT_POINT_SPACING_KM)
        mags, rates = gutenberg_richter_bins(f["rate_above_mmin"], f["b_value"], f["mmin"], f["mmax"])
        out.append((f["source_id"], pts, f["depth_km"], mags, rates / len(pts)))
    bg = BACKGROUND
    pts = background_points(bg["half_width_km"], bg["spacing_km"])
    mags, rates = gutenberg_richter_bins(bg["rate_above_mmin"], bg["b_value"], bg["mmin"], bg["mmax"])
    out.append((bg["source_id"], pts, bg["depth_km"], mags, rates / len(pts)))
    return out


# Standard-normal survival function Q(z) = erfc(z / sqrt 2) / 2, vectorised through a dense
# table of ln Q (computed with math.erfc) and linear interpolation in z. ln Q is concave with
# |d2 ln Q / dz2| <= 1, so the relative error is below h**2 / 8 = 3e-8 for h = 5e-4.
_Z_LO, _Z_HI, _Z_STEP = -9.0, 37.0, 5.0e-4
_Z_TABLE = np.linspace(_Z_LO, _Z_HI, int(round((_Z_HI - _Z_LO) / _Z_STEP)) + 1)
_LNQ_TABLE = np.log([0.5 * math.erfc(z / math.sqrt(2.0)) for z in _Z_TABLE])


def normal_survival(z):
    """P(Z > z) for a standard normal Z; exactly 0 beyond z = 37 (Q(37) < 1e-299)."""
    z = np.asarray(z, dtype=float)
    q = np.exp(np.interp(z, _Z_TABLE, _LNQ_TABLE))
    return np.where(z > _Z_HI, 0.0, q)


POINT_BLOCK = 64


def hazard_curves(site_xy, site_vs30, im_levels):
    """Mean annual exceedance rates [1/yr], shape (n_sites, n_ims, n_levels)."""
    ln_levels = np.log(im_levels)
    sources = point_sources()
    out = np.zeros((len(site_xy), len(IMS), len(im_levels)))
    for j, im in enumerate(IMS):
        c = ATTENUATION[im]
        site_term = c["c4"] * np.log(site_vs30 / 760.0)                        # (S,)
        for _, all_pts, depth, mags, rate_pm in sources:                        # a few sources
            # blocks of points only bound the memory of the (S, P, M, L) array
            for start in range(0, len(all_pts), POINT_BLOCK):
                pts = all_pts[start:start + POINT_BLOCK]
                d = site_xy[:, None, :] - pts[None, :, :]
                r = np.sqrt((d ** 2).sum(axis=-1) + depth ** 2)                 # (S, P)
                ln_median = (c["c0"] + c["c1"] * mags[None, None, :]
                             - c["c2"] * np.log(r + c["c3"])[:, :, None]
                             + site_term[:, None, None])                        # (S, P, M)
                z = (ln_levels[None, None, None, :] - ln_median[..., None]) / c["sigma"]
                p_exceed = normal_survival(z)                                   # (S, P, M, L)
                out[:, j, :] += np.einsum("spml,m->sl", p_exceed, rate_pm)
    return out


def im_at_rate_loglog(levels, rates, target_rate):
    """IM [g] where a tabulated curve crosses ``target_rate`` (log-log interpolation)."""
    lr, ll = np.log(rates[::-1]), np.log(levels[::-1])
    return float(np.exp(np.interp(math.log(target_rate), lr, ll)))


# --------------------------------------------------------------------------------------
# Fragility library (invented parameters)
# --------------------------------------------------------------------------------------
STATE_NAMES = ("cosmetic", "repairable", "irreparable", "collapse")
#: Invented contents damage ratio per state (contents loss / contents value), every class.
CONTENTS_DAMAGE_RATIO = (0.01, 0.08, 0.35, 0.8)
#: Invented contents value as a share of the replacement value, per class.
CONTENTS_SHARE = {"TMB": 0.2, "MAS-UR": 0.25, "MAS-TIE": 0.25, "RCF-LO": 0.3, "RCF-MID": 0.35, "RCW": 0.35,
                  "STL-BR": 0.5}
#: Invented value of one day of business interruption as a share of the replacement value [1/day].
INTERRUPTION_SHARE_PER_DAY = 0.0003

FRAGILITY = {
    "RCF-LO": {
        "description": "Reinforced-concrete moment frame, 1-3 storeys",
        "im": "SA_0.3",
        "median": (0.24, 0.52, 1.05, 1.70), "beta": (0.60, 0.62, 0.65, 0.68),
        "mdr": (0.02, 0.12, 0.55, 1.0), "cov": (0.9, 0.6, 0.35, None),
        "downtime_days": (3, 40, 240, 540), "casualty_rate": (0.0, 0.0002, 0.005, 0.08),
    },
    "RCF-MID": {
        "description": "Reinforced-concrete moment frame, 4-8 storeys",
        "im": "SA_1.0",
        "median": (0.10, 0.23, 0.48, 0.80), "beta": (0.62, 0.64, 0.67, 0.70),
        "mdr": (0.015, 0.10, 0.50, 1.0), "cov": (0.9, 0.6, 0.35, None),
        "downtime_days": (5, 60, 300, 720), "casualty_rate": (0.0, 0.0002, 0.006, 0.12),
    },
    "RCW": {
        "description": "Reinforced-concrete shear-wall building, 4-10 storeys",
        "im": "SA_0.6",
        "median": (0.20, 0.45, 0.92, 1.50), "beta": (0.58, 0.60, 0.63, 0.66),
        "mdr": (0.015, 0.10, 0.50, 1.0), "cov": (0.9, 0.6, 0.35, None),
        "downtime_days": (4, 50, 280, 720), "casualty_rate": (0.0, 0.0001, 0.004, 0.10),
    },
    "MAS-UR": {
        "description": "Unreinforced masonry bearing walls, 1-3 storeys",
        "im": "PGA",
        "median": (0.09, 0.18, 0.34, 0.58), "beta": (0.70, 0.72, 0.75, 0.78),
        "mdr": (0.03, 0.18, 0.65, 1.0), "cov": (0.8, 0.55, 0.3, None),
        "downtime_days": (5, 60, 300, 540), "casualty_rate": (0.0, 0.0005, 0.012, 0.15),
    },
    "MAS-TIE": {
        "description": "Masonry with reinforced-concrete tie columns and bond beams, 1-4 storeys",
        "im": "SA_0.3",
        "median": (0.21, 0.46, 0.92, 1.55), "beta": (0.62, 0.64, 0.67, 0.70),
        "mdr": (0.025, 0.15, 0.60, 1.0), "cov": (0.85, 0.55, 0.3, None),
        "downtime_days": (4, 50, 260, 540), "casualty_rate": (0.0, 0.0003, 0.008, 0.10),
    },
    "TMB": {
        "description": "Light timber frame, 1-2 storeys",
        "im": "SA_0.3",
        "median": (0.32, 0.72, 1.45, 2.40), "beta": (0.55, 0.58, 0.62, 0.64),
        "mdr": (0.02, 0.10, 0.45, 1.0), "cov": (1.0, 0.65, 0.4, None),
        "downtime_days": (2, 25, 150, 360), "casualty_rate": (0.0, 0.0001, 0.002, 0.03),
    },
    "STL-BR": {
        "description": "Steel braced frame, 2-6 storeys",
        "im": "SA_1.0",
        "median": (0.12, 0.28, 0.60, 1.02), "beta": (0.55, 0.58, 0.62, 0.65),
        "mdr": (0.01, 0.08, 0.45, 1.0), "cov": (0.9, 0.6, 0.35, None),
        "downtime_days": (3, 45, 250, 600), "casualty_rate": (0.0, 0.0001, 0.003, 0.06),
    },
}


def check_fragility(fragility, x_lo=LEVEL_MIN_G, x_hi=LEVEL_MAX_G):
    """Assert ordered states, plausible dispersions, feasible loss-ratio moments and no crossing
    of adjacent damage-state curves on [x_lo, x_hi]."""
    x_dense = np.geomspace(x_lo, x_hi, 4001)
    for code, c in fragility.items():
        med, beta = np.array(c["median"]), np.array(c["beta"])
        mdr = np.array(c["mdr"])
        assert len(med) == len(beta) == len(mdr) == len(STATE_NAMES), code
        assert np.all(np.diff(med) > 0), f"{code}: medians not increasing"
        assert np.all((beta >= 0.4) & (beta <= 0.8)), f"{code}: beta outside 0.4-0.8"
        assert np.all(np.diff(mdr) >= 0) and mdr[0] >= 0 and mdr[-1] == 1.0, f"{code}: mdr"
        for m, v in zip(c["mdr"], c["cov"]):
            if v is not None and v > 0:
                # a beta distribution with this mean and CoV exists iff cov^2 * m < 1 - m
                assert v * v * m < 1.0 - m, f"{code}: no beta distribution for mdr={m}, cov={v}"
        for i in range(len(med) - 1):
            m1, m2, b1, b2 = med[i], med[i + 1], beta[i], beta[i + 1]
            if b1 != b2:
                ln_x_cross = (b2 * math.log(m1) - b1 * math.log(m2)) / (b2 - b1)
                assert not (math.log(x_lo) <= ln_x_cross <= math.log(x_hi)), \
                    f"{code}: states {i} and {i + 1} cross at {math.exp(ln_x_cross):.4g} g"
            # Phi is monotone, so P(ds_{i+1}) <= P(ds_i) iff z_{i+1} <= z_i
            z1 = np.log(x_dense / m1) / b1
            z2 = np.log(x_dense / m2) / b2
            assert np.all(z2 <= z1), f"{code}: states {i} and {i + 1} cross"


def _toml_float(v):
    s = repr(float(v))
    return s if ("." in s or "e" in s) else s + ".0"


def fragility_toml(fragility):
    """The library in the quakefolio-fragility-1 TOML format (text)."""
    lines = [
        "# quakefolio fragility library. Every number in this file is invented for the demo.",
        f"# Invented building classes of {CITY_NAME} ({ISLAND_NAME}); generated by",
        "# demo_portfolio/build_inputs.py. Medians in g of the class's intensity measure.",
        'format = "quakefolio-fragility-1"',
    ]
    for code, c in fragility.items():
        lines += [
            "",
            f"[classes.{code}]",
            f'description = "{c["description"]} (invented parameters)"',
            f'im = "{c["im"]}"',
            f'collapse_state = "{STATE_NAMES[-1]}"',
        ]
        for i, name in enumerate(STATE_NAMES):
            lines += [
                "",
                f"[[classes.{code}.states]]",
                f'name = "{name}"',
                f"median = {_toml_float(c['median'][i])}  # g ({c['im']})",
                f"beta = {_toml_float(c['beta'][i])}",
                f"mean_damage_ratio = {_toml_float(c['mdr'][i])}",
            ]
            if c["cov"][i] is not None:
                lines.append(f"cov = {_toml_float(c['cov'][i])}")
            lines += [
                f"downtime_days = {int(c['downtime_days'][i])}",
                f"casualty_rate = {_toml_float(c['casualty_rate'][i])}",
                f"contents_damage_ratio = {_toml_float(CONTENTS_DAMAGE_RATIO[i])}",
            ]
    return "\n".join(lines) + "\n"


# --------------------------------------------------------------------------------------
# Exposure (invented)
# --------------------------------------------------------------------------------------
# name: centre (x, y) [km], spread (sx, sy) [km], number of assets, class shares
DISTRICTS = (
    ("Saltgrave Quay", (5.0, -7.8), (1.1, 0.8), 100,
     {"MAS-UR": 0.35, "MAS-TIE": 0.20, "TMB": 0.25, "RCF-LO": 0.20}),
    ("Lanternhill", (0.0, -3.0), (1.3, 1.3), 100,
     {"RCF-MID": 0.35, "RCW": 0.30, "STL-BR": 0.20, "RCF-LO": 0.15}),
    ("Corvell Flats", (-6.0, -11.0), (1.8, 0.9), 70,
     {"STL-BR": 0.40, "RCF-LO": 0.35, "MAS-TIE": 0.15, "RCW": 0.10}),
    ("Thistlerow", (5.0, 4.0), (1.6, 1.6), 110,
     {"TMB": 0.45, "MAS-TIE": 0.25, "RCF-LO": 0.20, "MAS-UR": 0.10}),
    ("Harnmere Rise", (-6.0, 5.5), (1.4, 1.4), 100,
     {"TMB": 0.50, "RCF-LO": 0.25, "MAS-TIE": 0.15, "RCW": 0.10}),
)

# class: median value [USD], log-sd, (min, max) [USD], value per occupant [USD/person]
VALUE_MODEL = {
    "TMB":     (0.9e6, 0.45, (0.4e6, 3.0e6), 250e3),
    "MAS-UR":  (1.6e6, 0.60, (0.4e6, 8.0e6), 120e3),
    "MAS-TIE":  (2.2e6, 0.60, (0.5e6, 12.0e6), 150e3),
    "RCF-LO":  (3.5e6, 0.60, (0.8e6, 18.0e6), 120e3),
    "RCF-MID": (16.0e6, 0.50, (5.0e6, 60.0e6), 100e3),
    "RCW":     (20.0e6, 0.50, (6.0e6, 60.0e6), 110e3),
    "STL-BR":  (9.0e6, 0.60, (2.0e6, 45.0e6), 400e3),
}
#: Invented terms groups (accounts): one per district, with a per-event deductible and limit [USD]
#: applied to the sum of the account's building net losses (group_terms.csv; every number invented).
ACCOUNTS = {
    "Saltgrave Quay": ("ACC-SALTGRAVE", 2_000_000, 40_000_000),
    "Lanternhill": ("ACC-LANTERNHILL", 10_000_000, 250_000_000),
    "Corvell Flats": ("ACC-CORVELL", 5_000_000, 120_000_000),
    "Thistlerow": ("ACC-THISTLEROW", 1_000_000, ""),
    "Harnmere Rise": ("ACC-HARNMERE", "", 60_000_000),
}
GRID_HALF_KM = 0.5 * (GRID_N - 1) * GRID_SPACING_KM
MIN_COAST_KM = 0.3
P_NO_DEDUCTIBLE, P_NO_LIMIT = 0.10, 0.12


def _sample_locations(rng, centre, spread, n):
    xs, ys = [], []
    while len(xs) < n:
        x = rng.normal(centre[0], spread[0], size=4 * n)
        y = rng.normal(centre[1], spread[1], size=4 * n)
        keep = ((np.abs(x) <= GRID_HALF_KM - 0.2) & (np.abs(y) <= GRID_HALF_KM - 0.2)
                & (coast_distance_km(x, y) >= MIN_COAST_KM))
        xs.extend(x[keep].tolist())
        ys.extend(y[keep].tolist())
    return np.array(xs[:n]), np.array(ys[:n])


def _sample_values(rng, cls):
    median, log_sd, (lo, hi), _ = VALUE_MODEL[cls]
    while True:
        v = median * math.exp(log_sd * rng.standard_normal())
        if lo <= v <= hi:
            return round(v / 1000.0) * 1000


def build_exposure(rng):
    """Rows of the invented portfolio as a list of dicts (CSV column order)."""
    rows = []
    for name, centre, spread, n, mix in DISTRICTS:
        x, y = _sample_locations(rng, centre, spread, n)
        classes = rng.choice(list(mix), size=n, p=list(mix.values()))
        vs30 = np.clip(vs30_field(x, y) * np.exp(0.08 * rng.standard_normal(n)), 180.0, 760.0)
        lon, lat = to_lonlat(x, y)
        for k in range(n):
            cls = str(classes[k])
            value = _sample_values(rng, cls)
            occupants = max(1, int(round(value / VALUE_MODEL[cls][3]
                                         * math.exp(0.3 * rng.standard_normal()))))
            ded_frac = rng.uniform(0.02, 0.05)
            lim_frac = rng.uniform(0.60, 1.00)
            no_ded = rng.random() < P_NO_DEDUCTIBLE
            no_lim = rng.random() < P_NO_LIMIT
            rows.append({
                "lon": f"{lon[k]:.5f}",
                "lat": f"{lat[k]:.5f}",
                "building_class": cls,
                "replacement_value": value,
                "vs30_mps": int(round(vs30[k])),
                "occupants": occupants,
                "deductible": "" if no_ded else int(round(ded_frac * value / 1000.0) * 1000),
                "limit": "" if no_lim else int(math.floor(lim_frac * value / 10000.0) * 10000),
                # invented, derived without random draws (the draws above are unchanged)
                "contents_value": int(round(CONTENTS_SHARE[cls] * value / 1000.0) * 1000),
                "interruption_value_per_day": int(round(INTERRUPTION_SHARE_PER_DAY * value / 10.0) * 10),
                "district": name,
                "terms_group": ACCOUNTS[name][0],
            })
    for i, r in enumerate(rows, start=1):
        r["asset_id"] = f"A{i:04d}"
    return rows


EXPOSURE_COLUMNS = ("asset_id", "lon", "lat", "building_class", "replacement_value",
                    "vs30_mps", "occupants", "deductible", "limit", "contents_value",
                    "interruption_value_per_day", "terms_group")
HAZARD_COLUMNS = ("site_id", "lon", "lat", "im", "im_level", "annual_rate", "statistic")


# --------------------------------------------------------------------------------------
# Main
# --------------------------------------------------------------------------------------
def hazard_sites():
    """Site ids, (lon, lat) strings and local coordinates of the 9 x 9 grid, read like a map
    (north-west first, rows west to east)."""
    offs = (np.arange(GRID_N) - (GRID_N - 1) / 2) * GRID_SPACING_KM
    ids, lon_s, lat_s = [], [], []
    for y in offs[::-1]:
        for x in offs:
            lo, la = to_lonlat(x, y)
            ids.append(f"S{len(ids) + 1:03d}")
            lon_s.append(f"{lo:.5f}")
            lat_s.append(f"{la:.5f}")
    lon = np.array([float(s) for s in lon_s])
    lat = np.array([float(s) for s in lat_s])
    x, y = to_xy(lon, lat)
    return ids, lon_s, lat_s, lon, lat, np.column_stack([x, y])


def main():
    rng = np.random.default_rng(SEED)

    # ---- hazard ----------------------------------------------------------------------
    ids, lon_s, lat_s, site_lon, site_lat, site_xy = hazard_sites()
    site_vs30 = vs30_field(site_xy[:, 0], site_xy[:, 1])
    level_s = [LEVEL_FORMAT % v for v in np.geomspace(LEVEL_MIN_G, LEVEL_MAX_G, N_LEVELS)]
    levels = np.array([float(s) for s in level_s])
    assert np.all(np.diff(levels) > 0) and levels[0] == LEVEL_MIN_G and levels[-1] == LEVEL_MAX_G

    rates = hazard_curves(site_xy, site_vs30, levels)
    # At the lowest levels almost every event exceeds, so the curves are flat to ~1e-8
    # (relative); ten significant digits keep the strict decrease visible in the file.
    rate_s = np.char.mod(RATE_FORMAT, rates)
    rates_r = rate_s.astype(float)
    assert np.all(rates_r > 0), "a rate rounded to zero"
    assert np.all(np.diff(rates_r, axis=-1) < 0), "rates not strictly decreasing after rounding"

    csv_lines = [",".join(HAZARD_COLUMNS)]
    cols = {k: [] for k in HAZARD_COLUMNS}
    for i, sid in enumerate(ids):
        for j, im in enumerate(IMS):
            for k, lev in enumerate(level_s):
                csv_lines.append(f"{sid},{lon_s[i]},{lat_s[i]},{im},{lev},{rate_s[i, j, k]},mean")
                cols["site_id"].append(sid)
                cols["lon"].append(site_lon[i])
                cols["lat"].append(site_lat[i])
                cols["im"].append(im)
                cols["im_level"].append(levels[k])
                cols["annual_rate"].append(rates_r[i, j, k])
                cols["statistic"].append("mean")
    (OUT_DIR / "hazard_curves.csv").write_text("\n".join(csv_lines) + "\n", encoding="utf-8")

    schema = pa.schema(
        [("site_id", pa.string()), ("lon", pa.float64()), ("lat", pa.float64()),
         ("im", pa.string()), ("im_level", pa.float64()), ("annual_rate", pa.float64()),
         ("statistic", pa.string())],
        metadata={
            b"quakefolio.units": json.dumps(
                {"lon": "deg", "lat": "deg", "im_level": "g", "annual_rate": "1/yr"},
                sort_keys=True).encode(),
            b"quakefolio.provenance": (
                f"Invented demo data ({CITY_NAME}, {ISLAND_NAME}); generated by "
                "demo_portfolio/build_inputs.py; describes no real place or dataset.").encode(),
        },
    )
    table = pa.Table.from_pydict(cols, schema=schema)
    pq.write_table(table, OUT_DIR / "hazard_curves.parquet", compression="snappy")

    # ---- fragility -------------------------------------------------------------------
    check_fragility(FRAGILITY)
    text = fragility_toml(FRAGILITY)
    parsed = tomllib.loads(text)
    assert parsed["format"] == "quakefolio-fragility-1"
    for code, c in FRAGILITY.items():
        states = parsed["classes"][code]["states"]
        assert [s["name"] for s in states] == list(STATE_NAMES)
        assert tuple(s["median"] for s in states) == c["median"]
        assert tuple(s["mean_damage_ratio"] for s in states) == c["mdr"]
    (OUT_DIR / "fragility_library.toml").write_text(text + "\n" + RETROFIT_CLASS_TOML, encoding="utf-8")

    # ---- exposure --------------------------------------------------------------------
    rows = build_exposure(rng)
    a_lon = np.array([float(r["lon"]) for r in rows])
    a_lat = np.array([float(r["lat"]) for r in rows])
    nearest_km = great_circle_km(a_lon[:, None], a_lat[:, None],
                                 site_lon[None, :], site_lat[None, :]).min(axis=1)
    assert nearest_km.max() < MAX_ASSET_TO_SITE_KM, nearest_km.max()
    assert len({r["asset_id"] for r in rows}) == len(rows) >= 420
    assert {r["building_class"] for r in rows} == set(FRAGILITY)
    assert all(180 <= r["vs30_mps"] <= 760 for r in rows)
    exp_lines = [",".join(EXPOSURE_COLUMNS)]
    exp_lines += [",".join(str(r[c]) for c in EXPOSURE_COLUMNS) for r in rows]
    (OUT_DIR / "exposure.csv").write_text("\n".join(exp_lines) + "\n", encoding="utf-8")
    terms = ["terms_group,deductible,limit"] + [f"{g},{d},{u}" for g, d, u in ACCOUNTS.values()]
    (OUT_DIR / "group_terms.csv").write_text("\n".join(terms) + "\n", encoding="utf-8")

    # ---- summary ---------------------------------------------------------------------
    pga = rates_r[:, IMS.index("PGA"), :]
    pga475 = np.array([im_at_rate_loglog(levels, pga[i], 1.0 / 475.0) for i in range(len(ids))])
    print(f"{CITY_NAME} demo inputs written to {OUT_DIR}")
    print(f"  sites {len(ids)}, IMs {len(IMS)}, levels {len(levels)}, "
          f"hazard rows {len(csv_lines) - 1}")
    print(f"  PGA at 475 yr: {pga475.min():.3f}-{pga475.max():.3f} g "
          f"(max at {ids[int(pga475.argmax())]}, min at {ids[int(pga475.argmin())]})")
    print(f"  rates at lowest level {rates_r[..., 0].min():.3g}-{rates_r[..., 0].max():.3g} /yr, "
          f"at highest {rates_r[..., -1].min():.3g}-{rates_r[..., -1].max():.3g} /yr")
    total_value = sum(r["replacement_value"] for r in rows)
    print(f"  assets {len(rows)}, classes {len(FRAGILITY)}, total value {total_value / 1e9:.3f} bn USD, "
          f"farthest asset from a site {nearest_km.max():.2f} km")


if __name__ == "__main__":
    main()
