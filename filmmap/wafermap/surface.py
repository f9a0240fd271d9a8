"""Thickness surfaces between the sites: thin-plate-spline interpolation and its LOO error.

A wafer's usable sites (inside the edge exclusion, finite, fit ok) are
interpolated with a thin-plate spline (kernel r^2 log r plus a linear
polynomial, exact at the sites) onto a square grid over the wafer. Grid
points beyond the *measured radius* - the radius of the outermost usable site
of that wafer - are NaN: the map is never extrapolated past the last ring
(and so never past the wafer edge). How far to trust the map between sites
is given by the leave-one-out (LOO) cross-validation error: the error at
site i of the spline built from all the other sites, computed in closed form.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.interpolate import RBFInterpolator

from filmmap.errors import FilmmapInputError
from filmmap.wafermap.sites import check_wafer, inside_edge_exclusion, lot_arrays

_RADIUS_SLACK = 1e-9  # relative slack so grid points on the outermost ring count as inside


@dataclass(frozen=True)
class Surface:
    """Interpolated thickness maps on a common grid.

    Attributes
    ----------
    x_mm : (nx,) grid x coordinates in mm.
    y_mm : (ny,) grid y coordinates in mm.
    thickness_nm : (W, ny, nx) thickness in nm, NaN beyond the measured
        radius (row index = y, column index = x; ``(ny, nx)`` for one wafer).
    measured_radius_mm : (W,) radius of the outermost usable site in mm
        (NaN when the wafer has fewer than 3 usable sites: no map).
    """

    x_mm: np.ndarray
    y_mm: np.ndarray
    thickness_nm: np.ndarray
    measured_radius_mm: np.ndarray


@dataclass(frozen=True)
class LeaveOneOut:
    """Leave-one-out errors of the thin-plate spline.

    Attributes
    ----------
    error_nm : (W, n_sites) t_i minus the spline of the other sites at site i,
        nm; NaN for sites not used.
    rms_nm : (W,) root mean square of ``error_nm`` over the usable sites, nm
        (NaN with fewer than 4 usable sites).
    """

    error_nm: np.ndarray
    rms_nm: np.ndarray


def grid_axes(diameter_mm, n_grid=101):
    """Square grid axes spanning the wafer, [-D/2, D/2] on both x and y.

    Parameters
    ----------
    diameter_mm : float
        Wafer diameter in mm.
    n_grid : int
        Grid points along each axis (>= 3).

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        ``x_mm`` and ``y_mm``, each shape (n_grid,), in mm.

    References
    ----------
    .. [1] Common practice, no source.
    """
    n = int(n_grid)
    if n != n_grid or n < 3:
        raise FilmmapInputError(f"n_grid must be an integer >= 3, got {n_grid!r}", field="n_grid")
    r = float(diameter_mm) / 2
    axis = np.linspace(-r, r, n)
    return axis, axis.copy()


def _groups(use):
    groups, inverse = np.unique(use, axis=0, return_inverse=True)
    inverse = np.asarray(inverse).ravel()
    return [(mask, np.nonzero(inverse == g)[0]) for g, mask in enumerate(groups)]


def _neighbours(n_sites):
    """``neighbors`` of `RBFInterpolator`: all sites, or the nearest ones on a dense map."""
    return None if n_sites <= DENSE_MAP_SITES else LOO_NEIGHBOURS


def _lot_splines(t, use, x, y, scale):
    """One thin-plate spline for the whole lot, through every site of the layout.

    A wafer with missing sites first gets, at those sites, the values of its
    own spline (built from its usable sites only); the layout spline through
    the completed data is then *that same* spline - the interpolant of given
    data is the unique minimiser of the bending energy (Duchon 1977), and the
    wafer's own spline already interpolates the completed data. So the costly
    evaluation on a grid is done once for the lot, not once per missing-site
    pattern.

    Returns
    -------
    evaluate : callable, points_mm (P, 2) -> (W_valid, P) thickness, or None
    valid : (W,) bool, wafers with a map (>= 3 usable, non-collinear sites)
    r_meas : (W,) radius of the outermost usable site, NaN where not valid
    """
    W = t.shape[0]
    layout = np.any(use, axis=0)
    cols = np.nonzero(layout)[0]
    site_r = np.hypot(x, y)
    filled = np.where(use, t, np.nan)[:, cols]
    valid = np.zeros(W, dtype=bool)
    r_meas = np.full(W, np.nan)
    pts = np.column_stack([x, y]) / scale
    for mask, rows in _groups(use):
        if mask.sum() < 3:
            continue
        missing = np.nonzero(layout & ~mask)[0]
        if missing.size:
            try:
                own = RBFInterpolator(pts[mask], t[np.ix_(rows, np.nonzero(mask)[0])].T,
                                      kernel="thin_plate_spline", degree=1,
                                      neighbors=_neighbours(mask.sum()))
                filled[np.ix_(rows, np.searchsorted(cols, missing))] = own(pts[missing]).T
            except (np.linalg.LinAlgError, ValueError):
                continue                  # collinear sites: no plane, no spline
        elif np.linalg.matrix_rank(np.column_stack([np.ones(mask.sum()), pts[mask]])) < 3:
            continue
        valid[rows] = True
        r_meas[rows] = site_r[mask].max()
    if not valid.any():
        return None, valid, r_meas
    spline = RBFInterpolator(pts[cols], filled[valid].T, kernel="thin_plate_spline", degree=1,
                             neighbors=_neighbours(cols.size))

    def evaluate(points_mm):
        return spline(np.asarray(points_mm, dtype=float) / scale).T

    return evaluate, valid, r_meas


def tps_surface(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm, *, n_grid=101):
    """Thin-plate-spline thickness map of each wafer on a square grid over the wafer.

    Parameters
    ----------
    thickness_nm : array_like, shape (W, n_sites) or (n_sites,)
        Thickness in nm, NaN for a missing site.
    ok : array_like of bool or None
        Fit-quality flag broadcastable to ``thickness_nm``; None = all ok.
    x_mm, y_mm : array_like, shape (n_sites,)
        Site coordinates in mm (wafer-centre origin, notch toward -y).
    diameter_mm, edge_exclusion_mm : float
        Wafer diameter and edge exclusion in mm.
    n_grid : int
        Grid points along each axis, spanning [-D/2, D/2].

    Returns
    -------
    Surface
        ``thickness_nm`` of shape (W, n_grid, n_grid), NaN beyond each
        wafer's measured radius; all NaN for a wafer with fewer than 3 usable
        sites or with collinear sites (no plane through them).

    Notes
    -----
    The whole lot is evaluated through one ``RBFInterpolator`` (one kernel
    matrix on the grid, one data column per wafer): a wafer with missing
    sites is first completed with its own spline's values there, which leaves
    its map unchanged (see `_lot_splines`).

    References
    ----------
    .. [1] J. Duchon, "Splines minimizing rotation-invariant semi-norms in
       Sobolev spaces", in Constructive Theory of Functions of Several
       Variables, Springer LNM vol. 571, 85-100 (1977).
    .. [2] scipy.interpolate.RBFInterpolator, kernel "thin_plate_spline"
       (phi(r) = r^2 log r, degree-1 polynomial, smoothing 0 = interpolating).
    """
    d, ee = check_wafer(diameter_mm, edge_exclusion_mm)
    t, good, x, y, single = lot_arrays(thickness_nm, ok, x_mm, y_mm)
    use = good & inside_edge_exclusion(x, y, d, ee)
    gx, gy = grid_axes(d, n_grid)
    GX, GY = np.meshgrid(gx, gy)
    gr = np.hypot(GX, GY).ravel()
    pts = np.column_stack([GX.ravel(), GY.ravel()])
    W = t.shape[0]
    z = np.full((W, gr.size), np.nan)
    evaluate, valid, r_meas = _lot_splines(t, use, x, y, d / 2)
    if evaluate is not None:
        reach = np.minimum(r_meas * (1 + _RADIUS_SLACK), d / 2)          # (W,), NaN if no map
        inside = np.nonzero(gr <= np.nanmax(reach))[0]
        vals = evaluate(pts[inside])                                     # (W_valid, n_inside)
        vals[gr[inside][None, :] > reach[valid][:, None]] = np.nan
        z[np.ix_(np.nonzero(valid)[0], inside)] = vals
    z = z.reshape(W, gy.size, gx.size)
    if single:
        z, r_meas = z[0], r_meas[0]
    return Surface(gx, gy, z, r_meas)


@dataclass(frozen=True)
class PolarSurface:
    """Interpolated thickness maps on a polar grid reaching exactly the measured radius.

    Attributes
    ----------
    rho : (n_r,) radius as a fraction of each wafer's measured radius, 0..1.
    theta_deg : (n_theta,) azimuth in degrees from +x, counter-clockwise, 0..360
        (both ends present, so the mesh closes).
    thickness_nm : (W, n_theta, n_r) thickness in nm at
        (r, theta) = (rho * measured_radius_mm, theta_deg); all NaN without a map.
    measured_radius_mm : (W,) radius of the outermost usable site in mm.
    """

    rho: np.ndarray
    theta_deg: np.ndarray
    thickness_nm: np.ndarray
    measured_radius_mm: np.ndarray

    def mesh(self, i=None):
        """(X_mm, Y_mm, Z_nm), each (n_theta, n_r), of wafer ``i`` (omit for one wafer)."""
        z = self.thickness_nm if i is None else self.thickness_nm[i]
        rm = self.measured_radius_mm if i is None else self.measured_radius_mm[i]
        rm = float(rm) if np.isfinite(rm) else 0.0
        th = np.deg2rad(self.theta_deg)[:, None]
        return rm * self.rho[None, :] * np.cos(th), rm * self.rho[None, :] * np.sin(th), z


def tps_polar_surface(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm, *,
                      n_r=40, n_theta=145):
    """Thin-plate-spline map of each wafer on a polar grid ending at its measured radius.

    The same interpolant as `tps_surface`, sampled on rings so that the
    outer boundary is the measured circle itself (no staircase edge, no
    extrapolation): the natural grid for drawing a map.

    Parameters
    ----------
    thickness_nm : array_like, shape (W, n_sites) or (n_sites,)
        Thickness in nm, NaN for a missing site.
    ok : array_like of bool or None
        Fit-quality flag broadcastable to ``thickness_nm``; None = all ok.
    x_mm, y_mm : array_like, shape (n_sites,)
        Site coordinates in mm.
    diameter_mm, edge_exclusion_mm : float
        Wafer diameter and edge exclusion in mm.
    n_r : int
        Rings from the centre to the measured radius (>= 2).
    n_theta : int
        Azimuths from 0 to 360 deg inclusive (>= 5).

    Returns
    -------
    PolarSurface
        ``thickness_nm`` (W, n_theta, n_r), or (n_theta, n_r) for one wafer.

    References
    ----------
    .. [1] J. Duchon (1977), thin-plate spline; scipy.interpolate.RBFInterpolator.
    """
    d, ee = check_wafer(diameter_mm, edge_exclusion_mm)
    t, good, x, y, single = lot_arrays(thickness_nm, ok, x_mm, y_mm)
    if int(n_r) < 2 or int(n_theta) < 5:
        raise FilmmapInputError("polar grid needs n_r >= 2 and n_theta >= 5", field="n_r")
    use = good & inside_edge_exclusion(x, y, d, ee)
    rho = np.linspace(0.0, 1.0, int(n_r))
    theta = np.linspace(0.0, 360.0, int(n_theta))
    th = np.deg2rad(theta)[:, None]
    unit = np.column_stack([(rho[None, :] * np.cos(th)).ravel(),
                            (rho[None, :] * np.sin(th)).ravel()])
    W = t.shape[0]
    z = np.full((W, theta.size * rho.size), np.nan)
    evaluate, valid, r_meas = _lot_splines(t, use, x, y, d / 2)
    if evaluate is not None:
        rm_valid = r_meas[valid]
        for rm in np.unique(rm_valid):          # one polar grid per measured radius
            sel = rm_valid == rm
            z[np.nonzero(valid)[0][sel]] = evaluate(rm * unit)[sel]
    z = z.reshape(W, theta.size, rho.size)
    if single:
        z, r_meas = z[0], r_meas[0]
    return PolarSurface(rho, theta, z, r_meas)


DENSE_MAP_SITES = 1000
"""A map with more usable sites than this is *dense*: its leave-one-out error is estimated
(`_local_loo`) and its map spline uses the `LOO_NEIGHBOURS` nearest sites of each point
(``RBFInterpolator(neighbors=...)``), because the exact forms solve a dense
(sites + 3)^2 system, 0.8 GB and minutes at 10,000 sites (common practice, no source)."""

LOO_SAMPLE_SITES = 400
"""Sites whose leave-one-out error is estimated on a dense map (evenly spread in site order)."""

LOO_NEIGHBOURS = 64
"""Nearest sites of the local spline that estimates one leave-one-out error on a dense map."""


def _local_loo(t, px, py):
    """Leave-one-out errors on a dense map, estimated at `LOO_SAMPLE_SITES` sites.

    At each sampled site i the thin-plate spline through i and its `LOO_NEIGHBOURS`
    nearest sites gives the leave-one-out error in closed form (Rippa 1999, as in
    `tps_loo`).  On a dense map the far sites barely move the spline near i, so this is
    close to the global error, at a cost that no longer grows with the site count.

    Parameters
    ----------
    t : (w, n) thickness, nm, of wafers sharing the usable sites
    px, py : (n,) site coordinates over the wafer radius (dimensionless)

    Returns
    -------
    (w, n) errors, nm; NaN at the sites not sampled.
    """
    from scipy.spatial import cKDTree

    w, n = t.shape
    out = np.full((w, n), np.nan)
    pts = np.column_stack([px, py])
    step = -(-n // LOO_SAMPLE_SITES)                     # ceil: at most LOO_SAMPLE_SITES
    sample = np.arange(0, n, step)
    _, near = cKDTree(pts).query(pts[sample], k=min(n, LOO_NEIGHBOURS + 1))
    for i, idx in zip(sample, near):
        idx = np.asarray(idx)
        idx = np.concatenate([[i], idx[idx != i]])     # site i first
        m = idx.size
        q = pts[idx]
        K = _tps_kernel(np.hypot(q[:, None, 0] - q[None, :, 0], q[:, None, 1] - q[None, :, 1]))
        P = np.column_stack([np.ones(m), q])
        M = np.block([[K, P], [P.T, np.zeros((3, 3))]])
        rhs = np.zeros((m + 3, w + 1))
        rhs[0, 0] = 1.0                                  # column 0 of M^-1 (M is symmetric)
        rhs[:m, 1:] = t[:, idx].T
        try:
            sol = np.linalg.solve(M, rhs)
        except np.linalg.LinAlgError:
            continue
        if abs(sol[0, 0]) < 1e-12 * np.abs(sol[:m, 0]).max():
            continue                                     # collinear without site i
        out[:, i] = sol[0, 1:] / sol[0, 0]
    return out


def _tps_kernel(r):
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(r > 0, r * r * np.log(np.where(r > 0, r, 1.0)), 0.0)


def tps_loo(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm):
    """Leave-one-out errors of the interpolating thin-plate spline, in closed form.

    For the interpolation system ``M [c; b] = [t; 0]`` with
    ``M = [[K, P], [P^T, 0]]`` (K_ij = phi(|x_i - x_j|), P = [1, x, y]), the
    error at site i of the spline built without site i is
    ``e_i = c_i / (M^-1)_ii`` (Rippa 1999), so one inverse per set of usable
    sites gives every error of every wafer sharing it.  Above `DENSE_MAP_SITES`
    usable sites the errors are estimated at `LOO_SAMPLE_SITES` sites from local splines
    of the `LOO_NEIGHBOURS` nearest sites (`_local_loo`; NaN at the other sites), so time
    and memory stay bounded for dense maps.

    Parameters
    ----------
    thickness_nm : array_like, shape (W, n_sites) or (n_sites,)
        Thickness in nm, NaN for a missing site.
    ok : array_like of bool or None
        Fit-quality flag broadcastable to ``thickness_nm``; None = all ok.
    x_mm, y_mm : array_like, shape (n_sites,)
        Site coordinates in mm.
    diameter_mm, edge_exclusion_mm : float
        Wafer diameter and edge exclusion in mm.

    Returns
    -------
    LeaveOneOut
        ``error_nm`` (W, n_sites) = t_i - s_(-i)(x_i) in nm and ``rms_nm`` (W,);
        NaN with fewer than 4 usable sites (leaving one out must leave a plane).

    References
    ----------
    .. [1] S. Rippa, "An algorithm for selecting a good value for the
       parameter c in radial basis function interpolation", Adv. Comput.
       Math. 11, 193-210 (1999), eq. for the leave-one-out error
       E_k = c_k / (A^-1)_kk.
    .. [2] J. Duchon (1977), thin-plate spline kernel r^2 log r.
    """
    d, ee = check_wafer(diameter_mm, edge_exclusion_mm)
    t, good, x, y, single = lot_arrays(thickness_nm, ok, x_mm, y_mm)
    use = good & inside_edge_exclusion(x, y, d, ee)
    W, S = t.shape
    err = np.full((W, S), np.nan)
    scale = d / 2
    for mask, rows in _groups(use):
        n = int(mask.sum())
        if n < 4:
            continue
        if n > DENSE_MAP_SITES:
            cols = np.nonzero(mask)[0]
            err[np.ix_(rows, cols)] = _local_loo(t[np.ix_(rows, cols)], x[cols] / scale,
                                                 y[cols] / scale)
            continue
        px, py = x[mask] / scale, y[mask] / scale
        K = _tps_kernel(np.hypot(px[:, None] - px[None, :], py[:, None] - py[None, :]))
        P = np.column_stack([np.ones(n), px, py])
        M = np.block([[K, P], [P.T, np.zeros((3, 3))]])
        try:
            Minv = np.linalg.inv(M)
        except np.linalg.LinAlgError:
            continue
        cols = np.nonzero(mask)[0]
        block = Minv[:n, :n]
        diag = np.diagonal(block)
        if np.any(np.abs(diag) < 1e-12 * np.abs(block).max()):
            continue                       # leaving some site out leaves collinear sites
        c = t[np.ix_(rows, cols)] @ block.T                    # (w, n): c = M^-1 [t; 0]
        err[np.ix_(rows, cols)] = c / diag
    done = np.isfinite(err)
    with np.errstate(invalid="ignore", divide="ignore"):
        rms = np.sqrt(np.where(done, err, 0.0).__pow__(2).sum(axis=1) / done.sum(axis=1))
    if single:
        err, rms = err[0], rms[0]
    return LeaveOneOut(err, rms)
