"""An independent furnace for the advice tests: its own Deal-Grove integration.

Written here without filmmap's growth code: the closed-form Deal-Grove solution
x^2 + A x = B (t + tau) (B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770 (1965)),
with Arrhenius constants as tabulated by Plummer, Deal & Griffin, Silicon VLSI
Technology (2000), ch. 6, quoted from memory (wet: C1 = 386 um^2/h, E1 = 0.78 eV,
C2 = 1.63e8 um/h, E2 = 2.05 eV, at 640 torr; dry: C1 = 772 um^2/h, E1 = 1.23 eV,
C2 = 6.23e6 um/h, E2 = 2.0 eV, at 1 atm; C2 is for (111) silicon, (100) divides B/A
by 1.68). Other textbooks print another wet C2 (9.7e7 um/h, also from memory):
116 min at 1000 C then grows 503 nm instead of 598 nm, which is why the growth
constants are the furnace owner's to set.

The furnace is a boat of slots whose temperature is the recipe's plus each heater
zone's error (a step between zones, a logistic blend of a given width, or an erf
blend unlike any shape filmmap's gain model knows), an end effect after the last
dummy, and noise: everything the tests know as the truth.
"""

from __future__ import annotations

import numpy as np

K_B = 8.617333262e-5       # eV/K (CODATA 2018)
WET = dict(C1=386.0, E1=0.78, C2=1.63e8, E2=2.05)     # um^2/h, eV, um/h, eV
DRY = dict(C1=772.0, E1=1.23, C2=6.23e6, E2=2.0)      # um^2/h, eV, um/h, eV
ORIENTATION_100 = 1.68


def parabolic_and_linear_um(T_C, ambient="H2O", orientation="100", rate_factor=1.0):
    """Deal-Grove B (um^2/h) and B/A (um/h) at ``T_C`` from the Arrhenius constants above."""
    c = WET if ambient == "H2O" else DRY
    T = np.asarray(T_C, dtype=float) + 273.15
    B = c["C1"] * np.exp(-c["E1"] / (K_B * T)) * rate_factor
    BA = c["C2"] * np.exp(-c["E2"] / (K_B * T)) * rate_factor
    return B, (BA / ORIENTATION_100 if orientation == "100" else BA)


def oxide_nm(minutes, T_C, ambient="H2O", initial_nm=1.5, orientation="100", rate_factor=1.0):
    """Oxide (nm) after ``minutes`` at ``T_C`` from ``initial_nm``: x^2 + A x = B (t + tau)."""
    B, BA = parabolic_and_linear_um(T_C, ambient, orientation, rate_factor)
    A = B / BA                                                                  # um
    x0 = initial_nm * 1e-3
    tau = (x0**2 + A * x0) / B                                                  # h
    t = minutes / 60.0
    return 1e3 * 0.5 * (-A + np.sqrt(A**2 + 4.0 * B * (t + tau)))


def minutes_to_grow(target_nm, T_C, ambient="H2O", initial_nm=1.5, orientation="100"):
    """Minutes from ``initial_nm`` to ``target_nm``: t = (x^2 - x0^2) / B + (x - x0) / (B/A)."""
    B, BA = parabolic_and_linear_um(T_C, ambient, orientation)
    x, x0 = target_nm * 1e-3, initial_nm * 1e-3
    return 60.0 * ((x**2 - x0**2) / B + (x - x0) / BA)


def wet_oxide_nm(minutes, T_C, initial_nm=1.5, rate_factor=1.0):
    """Wet oxide (nm) after ``minutes`` at ``T_C`` on (100) Si from ``initial_nm`` (closed form)."""
    return oxide_nm(minutes, T_C, "H2O", initial_nm, "100", rate_factor)


def zone_profile(slots, zones, errors_K, width_slots=0.0):
    """Temperature error per slot from zone errors: a step, or a logistic blend of that width."""
    s = np.asarray(slots, dtype=float)
    bounds = [0.5 * (zones[k][2] + zones[k + 1][1]) for k in range(len(zones) - 1)]
    out = np.full(s.shape, float(errors_K[0]))
    for b, lo, hi in zip(bounds, errors_K[:-1], errors_K[1:]):
        if width_slots == 0:
            step = (s > b).astype(float)
        else:
            step = 1.0 / (1.0 + np.exp(-(s - b) * 2 * np.log(9.0) / width_slots))
        out += (hi - lo) * step
    return out


def zone_profile_smooth(slots, zones, errors_K, sigma_slots):
    """Temperature error per slot when each heater zone's own error spreads along the boat
    as a Gaussian of ``sigma_slots`` (an erf blend between zones, not the logistic or
    linear ramp of filmmap's gain model); the end zones reach past the boat."""
    from scipy.special import erf

    s = np.asarray(slots, dtype=float)
    edges = ([-np.inf] + [0.5 * (zones[k][2] + zones[k + 1][1]) for k in range(len(zones) - 1)]
             + [np.inf])
    scale = np.sqrt(2.0) * float(sigma_slots)
    out = np.zeros(s.shape)
    for lo, hi, e in zip(edges[:-1], edges[1:], errors_K):
        out += float(e) * 0.5 * (erf((s - lo) / scale) - erf((s - hi) / scale))
    return out


ZONES = (("load", 1, 17), ("center", 18, 34), ("source", 35, 50))
DUMMIES = (1, 2, 3, 48, 49, 50)
PRODUCT = np.arange(4, 48)


def measured_means(T_offset, minutes=116.0, T_C=1000.0, noise_nm=0.0, rng=None, rate_factor=1.0):
    """Wafer means (nm) of the product slots for per-slot temperature offsets (K)."""
    x = wet_oxide_nm(minutes, T_C + np.asarray(T_offset, dtype=float), rate_factor=rate_factor)
    if noise_nm:
        x = x + noise_nm * rng.standard_normal(x.shape)
    return x
