"""Global search without a starting value: a model library scored by matrix products.

For a lot, every spectrum shares the stack and the wavelength grid, so the
predicted spectra on a grid of candidate thicknesses form one library
(G x M) computed once. The weighted chi-square of every spectrum against
every library entry expands as

    chi2[s, g] = sum_j w_sj y_sj^2 - 2 sum_j (w y)_sj f_gj + sum_j w_sj f_gj^2,

two matrix products (one when all spectra share their weights), so scoring
thousands of spectra against hundreds of candidates costs about one forward
model evaluation and never depends on a nominal value. Local minima of chi2
on the grid are the candidate basins (fringe orders) handed to the local fit.
"""

from __future__ import annotations

import numpy as np

from filmmap.fitting.model import ELLIPSOMETRY


LIBRARY_CHUNK_VALUES = 2**21
"""Library entries x data points evaluated at once (bounds the recursion's temporaries)."""


def grid_step_nm(model, layer, fineness=16.0):
    """Grid step for a layer thickness: a fraction of the shortest in-film half-wave.

    The chi-square basin of the right fringe order is about lambda / (8 n cos)
    wide on each side at the shortest wavelength, so a step of
    lambda_min / (fineness * n * cos) puts several grid points in it.
    """
    sin0 = np.sin(np.deg2rad(model.angle_deg))
    q = np.sqrt(np.maximum(np.real(model.N_layers[layer]) ** 2 - sin0**2, 1e-6))
    half_wave = np.min(model.wavelength_nm / q)
    return half_wave / fineness


def ncs(psi_delta, m):
    """Psi/Delta (degrees, (..., 2m)) -> N, C, S = cos2Psi, sin2Psi cosDelta, sin2Psi sinDelta.

    A wrap-free representation for scoring by matrix products (Delta's 0/360
    seam disappears). References: Fujiwara, Spectroscopic Ellipsometry (2007), sect. 3.4.
    """
    psi = np.radians(psi_delta[..., :m])
    delta = np.radians(psi_delta[..., m:])
    s2 = np.sin(2 * psi)
    return np.concatenate([np.cos(2 * psi), s2 * np.cos(delta), s2 * np.sin(delta)], axis=-1)


def build_library(model, grids):
    """Library of predicted spectra on the Cartesian grid of the searched parameters.

    Parameters
    ----------
    model : SpectralModel
    grids : list of numpy.ndarray
        One 1-D grid per free parameter (length 1 = held at that value).

    Returns
    -------
    points : numpy.ndarray (G, p)
        Parameter vectors of the library entries.
    library : numpy.ndarray (G, M')
        Predictions (N, C, S form for ellipsometry).
    """
    mesh = np.meshgrid(*grids, indexing="ij")
    points = np.stack([g.ravel() for g in mesh], axis=1)
    # in chunks: the recursion's complex intermediates are several times the library
    chunk = max(1, LIBRARY_CHUNK_VALUES // max(model.n_points, 1))
    parts = []
    for a in range(0, points.shape[0], chunk):
        f = model.evaluate(points[a:a + chunk])
        if model.technique == ELLIPSOMETRY:
            f = ncs(f, model.wavelength_nm.size)
        parts.append(np.asarray(f))
    return points, parts[0] if len(parts) == 1 else np.concatenate(parts)


def score_library(y, w, library, chunk=2048):
    """Weighted chi-square of every spectrum against every library entry.

    Parameters
    ----------
    y : numpy.ndarray (n, M')
    w : numpy.ndarray (n, M') or (M',)
        Weights (1/sigma^2); zeros mask points.
    library : numpy.ndarray (G, M')

    Returns
    -------
    numpy.ndarray (n, G)
    """
    shared = w.ndim == 1
    lib_t = library.T
    lib2_t = (library * library).T
    out = np.empty((y.shape[0], library.shape[0]))
    for start in range(0, y.shape[0], chunk):
        sl = slice(start, start + chunk)
        wy = (w if shared else w[sl]) * y[sl]
        base = np.einsum("nm,nm->n", wy, y[sl])[:, None]
        quad = (w @ lib2_t)[None, :] if shared else w[sl] @ lib2_t
        out[sl] = base - 2.0 * (wy @ lib_t) + quad
    # rounding can take a perfect match a hair below zero
    np.maximum(out, 0.0, out=out)
    return out


def local_minima(chi2, shape):
    """Boolean mask (n, G) of grid points not higher than any axis neighbour."""
    n = chi2.shape[0]
    if len([s for s in shape if s > 1]) <= 1:
        mask = np.ones_like(chi2, dtype=bool)
        if chi2.shape[1] > 1:
            mask[:, 1:] &= chi2[:, 1:] <= chi2[:, :-1]
            mask[:, :-1] &= chi2[:, :-1] < chi2[:, 1:]
        return mask
    c = chi2.reshape((n,) + tuple(shape))
    mask = np.ones_like(c, dtype=bool)
    for ax in range(1, c.ndim):
        if c.shape[ax] == 1:
            continue
        pad = [(0, 0)] * c.ndim
        pad[ax] = (1, 1)
        cp = np.pad(c, pad, mode="constant", constant_values=np.inf)
        lo = np.take(cp, np.arange(0, c.shape[ax]), axis=ax)
        hi = np.take(cp, np.arange(2, c.shape[ax] + 2), axis=ax)
        mask &= (c <= lo) & (c < hi)
    return mask.reshape(n, -1)


def parabolic_vertex(grid, chi2, rows, idx):
    """Refine 1-D grid minima by a parabola through the three neighbouring points.

    Parameters
    ----------
    grid : numpy.ndarray (G,)
        Uniform grid.
    chi2 : numpy.ndarray (n, G)
        Scores on the grid.
    rows, idx : numpy.ndarray (k,) of int
        Spectrum and grid index of each minimum.

    Returns
    -------
    x : numpy.ndarray (k,)
        Vertex positions (within one grid step of the minimum).
    c : numpy.ndarray (k,)
        Vertex values (an estimate of the basin minimum).
    """
    G = grid.size
    i = np.clip(idx, 1, G - 2)
    c0 = chi2[rows, i - 1]
    c1 = chi2[rows, i]
    c2 = chi2[rows, i + 1]
    h = grid[1] - grid[0] if G > 1 else 1.0
    denom = c0 - 2 * c1 + c2
    with np.errstate(divide="ignore", invalid="ignore"):
        shift = np.where(denom > 0, 0.5 * (c0 - c2) / denom, 0.0)
    shift = np.clip(shift, -1.0, 1.0)
    x = grid[i] + shift * h
    c = c1 - 0.25 * (c0 - c2) * shift
    edge = (idx == 0) | (idx == G - 1)
    x = np.where(edge, grid[idx], x)
    c = np.where(edge, chi2[rows, idx], np.minimum(c, c1))
    return x, np.maximum(c, 0.0)
