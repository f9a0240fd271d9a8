"""Zernike decomposition of wafer thickness maps, Noll (1976) indexing and normalisation.

The thickness map of a wafer is written as ``t(rho, theta) = sum_j a_j Z_j(rho,
theta)`` over the unit disk, with the single-index polynomials ``Z_j`` of Noll
(1976): j = 1 piston, 2-3 tilt, 4 defocus (bowl), 5-6 astigmatism (saddle),
7-8 coma, 9-10 trefoil, 11 spherical, ... Each is normalised so that
``(1/pi) * integral over the unit disk of Z_i Z_j = delta_ij``; the
coefficient ``a_j`` (nm) is therefore the RMS contribution of term j over the
normalisation disk.

Conventions
-----------
* ``rho = r / radius_mm``; ``radius_mm`` defaults to the *measured radius*: the
  largest radius among the sites inside the edge exclusion (for the built-in
  patterns this is D/2 - edge exclusion). The polynomials are then never
  evaluated outside the measured area, and "edge" in the figures below means
  the outermost measured ring. Pass ``radius_mm`` (e.g. the wafer radius) to
  compare lots measured with different patterns.
* ``theta`` from +x, counter-clockwise, notch toward -y (see `sites`).
* Signed m of `noll_to_nm`: m > 0 -> cos(m theta) term (even j), m < 0 ->
  sin(|m| theta) term (odd j), m = 0 -> rotationally symmetric.

References
----------
.. [1] R. J. Noll, "Zernike polynomials and atmospheric turbulence",
   J. Opt. Soc. Am. 66, 207-211 (1976), eqs. (1)-(5) and Table I.
.. [2] M. Born and E. Wolf, Principles of Optics, 7th ed. (1999), sect. 9.2.1
   and appendix VII (radial polynomials).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.wafermap.sites import check_wafer, inside_edge_exclusion, lot_arrays

#: Largest condition number (2-norm) accepted for the site design matrix when
#: choosing the fit order automatically.
COND_MAX = 10.0

#: Residual degrees of freedom kept when choosing the fit order automatically.
MIN_DOF = 2


def noll_to_nm(j):
    """Radial order n and signed azimuthal frequency m of Noll index j.

    Parameters
    ----------
    j : int
        Noll index, >= 1.

    Returns
    -------
    (int, int)
        ``(n, m)``; m > 0 means the cos(m theta) member (j even), m < 0 the
        sin(|m| theta) member (j odd), m = 0 rotationally symmetric.

    References
    ----------
    .. [1] R. J. Noll, J. Opt. Soc. Am. 66, 207 (1976), eq. (3) and Table I:
       modes are ordered by n, then by |m|; for m != 0 even j carries cos and
       odd j carries sin.
    """
    j = int(j)
    if j < 1:
        raise FilmmapInputError(f"Noll index must be >= 1, got {j}", field="j")
    n = int((math.isqrt(8 * j - 7) - 1) // 2)
    k = j - n * (n + 1) // 2 - 1          # position within radial order n, 0-based
    m = 2 * ((k + 1) // 2) if n % 2 == 0 else 2 * (k // 2) + 1
    if m == 0:
        return n, 0
    return n, (m if j % 2 == 0 else -m)


def n_terms(order):
    """Number of Noll terms up to and including radial order ``order``: (n+1)(n+2)/2.

    Parameters
    ----------
    order : int
        Highest radial order n (>= 0).

    Returns
    -------
    int

    References
    ----------
    .. [1] R. J. Noll (1976), Table I (count of modes per radial order).
    """
    order = int(order)
    return (order + 1) * (order + 2) // 2


def zernike_radial(n, m, rho):
    """Zernike radial polynomial R_n^|m|(rho) (not normalised, R(1) = 1).

    Parameters
    ----------
    n : int
        Radial order.
    m : int
        Azimuthal frequency (sign ignored); n - |m| must be even and >= 0.
    rho : array_like
        Normalised radius (dimensionless).

    Returns
    -------
    numpy.ndarray

    References
    ----------
    .. [1] R. J. Noll (1976), eq. (2):
       R_n^m(r) = sum_{s=0}^{(n-m)/2} (-1)^s (n-s)! /
       [s! ((n+m)/2 - s)! ((n-m)/2 - s)!] r^(n-2s).
    """
    m = abs(int(m))
    n = int(n)
    if n < 0 or m > n or (n - m) % 2:
        raise FilmmapInputError(f"no radial polynomial for n={n}, m={m}", field="m")
    rho = np.asarray(rho, dtype=float)
    out = np.zeros_like(rho)
    for s in range((n - m) // 2 + 1):
        c = (-1) ** s * math.factorial(n - s) / (
            math.factorial(s) * math.factorial((n + m) // 2 - s)
            * math.factorial((n - m) // 2 - s))
        out = out + c * rho ** (n - 2 * s)
    return out


def noll_zernike(j, rho, theta):
    """Noll-normalised Zernike polynomial Z_j(rho, theta).

    Parameters
    ----------
    j : int
        Noll index (>= 1).
    rho : array_like
        Normalised radius (dimensionless, unit disk: 0 <= rho <= 1).
    theta : array_like
        Azimuth in radians from +x, counter-clockwise.

    Returns
    -------
    numpy.ndarray
        Z_j = sqrt(n+1) R_n^0 for m = 0; sqrt(2(n+1)) R_n^m cos(m theta) for
        even j, sqrt(2(n+1)) R_n^m sin(m theta) for odd j (m != 0).

    References
    ----------
    .. [1] R. J. Noll (1976), eqs. (1)-(4) and Table I; normalisation
       (1/pi) * integral over the unit disk of Z_j^2 = 1.
    """
    n, m = noll_to_nm(j)
    rho = np.asarray(rho, dtype=float)
    theta = np.asarray(theta, dtype=float)
    radial = zernike_radial(n, m, rho)
    if m == 0:
        return math.sqrt(n + 1) * radial * np.ones_like(theta)
    trig = np.cos(m * theta) if m > 0 else np.sin(-m * theta)
    return math.sqrt(2 * (n + 1)) * radial * trig


def zernike_basis(count, rho, theta):
    """The first ``count`` Noll polynomials at the given points.

    Parameters
    ----------
    count : int
        Number of terms, j = 1 .. count.
    rho, theta : array_like, same shape S
        Normalised radius (dimensionless) and azimuth (radians).

    Returns
    -------
    numpy.ndarray, shape S + (count,)

    References
    ----------
    .. [1] R. J. Noll (1976), Table I.
    """
    rho = np.asarray(rho, dtype=float)
    theta = np.asarray(theta, dtype=float)
    return np.stack([noll_zernike(j, rho, theta) for j in range(1, int(count) + 1)], axis=-1)


def choose_order(rho, theta, max_order=None, cond_max=COND_MAX, min_dof=MIN_DOF):
    """Highest complete radial order a set of sites supports.

    Rule (filmmap's own): the largest n such that all (n+1)(n+2)/2 Noll terms
    of orders 0..n (i) leave at least ``min_dof`` residual degrees of freedom
    (terms <= sites - min_dof) and (ii) give a site design matrix with
    2-norm condition number <= ``cond_max``. Only complete orders are used so
    that the fit does not depend on how the wafer is rotated. With the
    defaults (``COND_MAX`` = 10, ``MIN_DOF`` = 2) the built-in patterns get
    (sites: order/terms) 5: 1/3, 9: 2/6, 13: 3/10, 17: 3/10, 25: 4/15,
    49: 5/21, 121: 8/45; a single site gets nothing (-1).

    Parameters
    ----------
    rho, theta : array_like, shape (n_sites,)
        Normalised radius and azimuth (radians) of the usable sites.
    max_order : int, optional
        Upper limit on n.
    cond_max : float
        Largest accepted condition number (dimensionless).
    min_dof : int
        Residual degrees of freedom to keep (>= 1 so that uncertainties exist).

    Returns
    -------
    int
        The order n, or -1 when not even the piston can be fitted.

    References
    ----------
    .. [1] Common practice, no source: truncate a least-squares basis where the
       design matrix stays well conditioned.
    """
    rho = np.asarray(rho, dtype=float).ravel()
    theta = np.asarray(theta, dtype=float).ravel()
    order = 0
    while n_terms(order + 1) <= rho.size - min_dof and (max_order is None or order < max_order):
        order += 1
    if n_terms(order) > rho.size - min_dof or (max_order is not None and max_order < 0):
        return -1
    # adding columns never lowers the condition number (singular-value interlacing), so the
    # orders that pass are 0..n* and the first failure ends the search: stepping up costs
    # SVDs of the small matrices up to n* + 1 only, never of the dof-limit matrix (which
    # for a dense map has thousands of columns: one SVD per order from there took minutes)
    best = -1
    for k in range(order + 1):
        sv = np.linalg.svd(zernike_basis(n_terms(k), rho, theta), compute_uv=False)
        if not (sv[-1] > 0 and sv[0] / sv[-1] <= cond_max):
            break
        best = k
    return best


def measured_radius(x_mm, y_mm, diameter_mm, edge_exclusion_mm):
    """Largest radius (mm) among the sites inside the edge exclusion.

    Parameters
    ----------
    x_mm, y_mm : array_like, shape (n_sites,)
        Site coordinates in mm.
    diameter_mm, edge_exclusion_mm : float
        Wafer diameter and edge exclusion in mm.

    Returns
    -------
    float
        The measured radius in mm; D/2 - edge exclusion when no site off the
        centre lies inside the edge exclusion (the value then only scales rho).

    References
    ----------
    .. [1] Common practice, no source.
    """
    d, ee = check_wafer(diameter_mm, edge_exclusion_mm)
    x = np.asarray(x_mm, dtype=float)
    y = np.asarray(y_mm, dtype=float)
    r = np.hypot(x, y)[inside_edge_exclusion(x, y, d, ee)]
    return float(r.max()) if r.size and r.max() > 0 else d / 2 - ee


@dataclass(frozen=True)
class ZernikeFit:
    """Per-wafer Zernike decomposition (see `zernike_fit`).

    Shapes are given for a lot of W wafers and J = ``coefficients_nm.shape[-1]``
    Noll terms (j = 1..J); for a single wafer (1-D input) the leading W axis
    is dropped. Terms a wafer could not support are NaN.

    Attributes
    ----------
    coefficients_nm : (W, J) Noll coefficients a_j in nm.
    uncertainty_nm : (W, J) standard uncertainty of a_j in nm (from the residual).
    covariance_nm2 : (W, J, J) covariance of the coefficients in nm^2.
    order : (W,) highest radial order fitted (-1: nothing fitted).
    n_terms : (W,) number of Noll terms fitted.
    dof : (W,) residual degrees of freedom (sites used - terms).
    residual_sigma_nm : (W,) residual standard deviation sqrt(RSS / dof) in nm.
    radius_mm : normalisation radius in mm (rho = r / radius_mm).
    tilt_pv_nm, tilt_pv_u_nm : (W,) tilt peak-to-valley across the
        normalisation diameter, 4 sqrt(a2^2 + a3^2), and its uncertainty, nm.
    tilt_direction_deg : (W,) direction of increasing thickness,
        atan2(a3, a2) in [0, 360) deg, 0 = +x, counter-clockwise.
    defocus_nm, defocus_u_nm : (W,) centre-to-edge figure of the defocus term,
        a4 (Z4(1) - Z4(0)) = 2 sqrt(3) a4, and its uncertainty, nm; > 0 means
        thicker at the edge (dish), < 0 thicker at the centre (dome).
    astig_pv_nm : (W,) astigmatism peak-to-valley at rho = 1,
        2 sqrt(6) sqrt(a5^2 + a6^2), nm.
    astig_angle_deg : (W,) axis of the thick side of the astigmatism,
        0.5 atan2(a5, a6) in [0, 180) deg.
    """

    coefficients_nm: np.ndarray
    uncertainty_nm: np.ndarray
    covariance_nm2: np.ndarray
    order: np.ndarray
    n_terms: np.ndarray
    dof: np.ndarray
    residual_sigma_nm: np.ndarray
    radius_mm: float
    tilt_pv_nm: np.ndarray
    tilt_pv_u_nm: np.ndarray
    tilt_direction_deg: np.ndarray
    defocus_nm: np.ndarray
    defocus_u_nm: np.ndarray
    astig_pv_nm: np.ndarray
    astig_angle_deg: np.ndarray


def zernike_fit(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm, *,
                max_order=None, radius_mm=None, cond_max=COND_MAX, min_dof=MIN_DOF):
    """Least-squares Noll-Zernike decomposition of each wafer through its sites.

    Only sites inside the edge exclusion whose thickness is finite and whose
    ``ok`` flag is set are used. The radial order is chosen once for the site
    layout by `choose_order` (capped by ``max_order``); a wafer whose usable
    sites cannot support that order (missing sites) gets the highest order
    its own sites support and NaN for the dropped terms. Wafers sharing the
    same usable sites share one pseudo-inverse, so a lot is a few matrix
    products.

    Parameters
    ----------
    thickness_nm : array_like, shape (W, n_sites) or (n_sites,)
        Thickness in nm, NaN for a missing site.
    ok : array_like of bool or None
        Fit-quality flag, broadcastable to ``thickness_nm``; None = all ok.
    x_mm, y_mm : array_like, shape (n_sites,)
        Site coordinates in mm (wafer-centre origin, notch toward -y).
    diameter_mm, edge_exclusion_mm : float
        Wafer diameter and edge exclusion in mm.
    max_order : int, optional
        Highest radial order n allowed.
    radius_mm : float, optional
        Normalisation radius in mm; default the measured radius
        (`measured_radius`). Must not be smaller than the outermost site used.
    cond_max : float
        Condition-number limit for `choose_order` (dimensionless).
    min_dof : int
        Residual degrees of freedom to keep (>= 1).

    Returns
    -------
    ZernikeFit
        Coefficients a_j (nm), standard uncertainties u(a_j) = sqrt(s^2
        [(A^T A)^-1]_jj) with s^2 = RSS / dof, and the derived tilt, defocus
        and astigmatism figures (see `ZernikeFit`).

    References
    ----------
    .. [1] R. J. Noll, J. Opt. Soc. Am. 66, 207 (1976), Table I (basis).
    .. [2] Common practice, no source: ordinary least squares, covariance
       s^2 (A^T A)^-1 with s^2 the residual variance (any linear-regression text).
    """
    t, good, x, y, single = lot_arrays(thickness_nm, ok, x_mm, y_mm)
    d, ee = check_wafer(diameter_mm, edge_exclusion_mm)
    if int(min_dof) < 1:
        raise FilmmapInputError("min_dof must be >= 1", field="min_dof")
    inside = inside_edge_exclusion(x, y, d, ee)
    use = good & inside
    r = np.hypot(x, y)
    theta = np.arctan2(y, x)
    r_meas = measured_radius(x, y, d, ee)
    if radius_mm is None:
        radius = r_meas
    else:
        radius = float(radius_mm)
        if not np.isfinite(radius) or radius <= 0 or radius < r_meas - 1e-6:
            raise FilmmapInputError(
                f"radius_mm must be >= the outermost site used ({r_meas:g} mm), got {radius_mm!r}",
                field="radius_mm")
    rho = r / radius
    top = choose_order(rho[inside], theta[inside], max_order, cond_max, min_dof)
    J = n_terms(top) if top >= 0 else 0
    W = t.shape[0]
    coef = np.full((W, J), np.nan)
    cov = np.full((W, J, J), np.nan)
    order = np.full(W, -1)
    count = np.zeros(W, dtype=int)
    dof = np.zeros(W, dtype=int)
    sigma = np.full(W, np.nan)
    if J:
        basis = zernike_basis(J, rho, theta)                        # (n_sites, J), once
        groups, inverse = np.unique(use, axis=0, return_inverse=True)
        inverse = np.asarray(inverse).ravel()
        for g, mask in enumerate(groups):
            rows = np.nonzero(inverse == g)[0]
            n_used = int(mask.sum())
            o = top
            while o >= 0 and n_terms(o) > n_used - min_dof:
                o -= 1
            while o >= 0:      # same rule as choose_order, stepping down from the lot's order
                k = n_terms(o)
                A = basis[mask, :k]                                 # (n_used, k)
                U, S, Vt = np.linalg.svd(A, full_matrices=False)
                if S[-1] > 0 and S[0] / S[-1] <= cond_max:
                    break
                o -= 1
            if o < 0:
                continue
            P = (Vt.T / S) @ U.T                                    # pseudo-inverse (k, n_used)
            T = t[np.ix_(rows, np.nonzero(mask)[0])]                # (w, n_used)
            a = T @ P.T
            res = T - a @ A.T
            nu = n_used - k
            s2 = np.einsum("ij,ij->i", res, res) / nu
            coef[rows, :k] = a
            unscaled = (Vt.T / S**2) @ Vt                           # (A^T A)^-1
            cov[np.ix_(rows, np.arange(k), np.arange(k))] = s2[:, None, None] * unscaled
            order[rows], count[rows], dof[rows], sigma[rows] = o, k, nu, np.sqrt(s2)
    unc = np.sqrt(np.diagonal(cov, axis1=1, axis2=2)) if J else np.zeros((W, 0))

    def term(jj):
        return coef[:, jj - 1] if J >= jj else np.full(W, np.nan)

    a2, a3, a4, a5, a6 = (term(jj) for jj in (2, 3, 4, 5, 6))
    amp = np.hypot(a2, a3)
    with np.errstate(invalid="ignore", divide="ignore"):
        tilt_dir = np.where(amp > 0, np.degrees(np.arctan2(a3, a2)) % 360.0, np.nan)
        if J >= 3:
            g = np.stack([a2, a3], axis=-1) / amp[:, None]
            tilt_u = 4.0 * np.sqrt(np.einsum("wi,wij,wj->w", g, cov[:, 1:3, 1:3], g))
        else:
            tilt_u = np.full(W, np.nan)
    defocus_u = 2 * math.sqrt(3) * unc[:, 3] if J >= 4 else np.full(W, np.nan)
    astig = np.hypot(a5, a6)
    astig_ang = np.where(astig > 0, (0.5 * np.degrees(np.arctan2(a5, a6))) % 180.0, np.nan)
    out = dict(coefficients_nm=coef, uncertainty_nm=unc, covariance_nm2=cov, order=order,
               n_terms=count, dof=dof, residual_sigma_nm=sigma, tilt_pv_nm=4.0 * amp,
               tilt_pv_u_nm=tilt_u, tilt_direction_deg=tilt_dir,
               defocus_nm=2 * math.sqrt(3) * a4, defocus_u_nm=defocus_u,
               astig_pv_nm=2 * math.sqrt(6) * astig, astig_angle_deg=astig_ang)
    if single:
        out = {k: v[0] for k, v in out.items()}
    return ZernikeFit(radius_mm=radius, **out)


def zernike_evaluate(coefficients_nm, x_mm, y_mm, radius_mm):
    """Thickness (nm) of a Zernike expansion at arbitrary points.

    Parameters
    ----------
    coefficients_nm : array_like, shape (W, J) or (J,)
        Noll coefficients a_1..a_J in nm; NaN entries (terms not fitted)
        count as 0, a wafer with no finite coefficient evaluates to NaN.
    x_mm, y_mm : array_like, same shape S
        Points in mm (wafer-centre origin).
    radius_mm : float
        Normalisation radius in mm used for the fit.

    Returns
    -------
    numpy.ndarray, shape (W,) + S or S
        sum_j a_j Z_j(r / radius_mm, theta).

    References
    ----------
    .. [1] R. J. Noll (1976), Table I.
    """
    c = np.asarray(coefficients_nm, dtype=float)
    single = c.ndim == 1
    c = np.atleast_2d(c)
    x = np.asarray(x_mm, dtype=float)
    y = np.asarray(y_mm, dtype=float)
    basis = zernike_basis(c.shape[1], np.hypot(x, y) / float(radius_mm), np.arctan2(y, x))
    val = np.tensordot(np.nan_to_num(c, nan=0.0), basis, axes=([1], [-1]))
    none = ~np.any(np.isfinite(c), axis=1)
    val[none] = np.nan
    return val[0] if single else val


@dataclass(frozen=True)
class RadialProfile:
    """Mean thickness per ring of sites (see `radial_profile`).

    Attributes
    ----------
    radius_mm : (K,) mean radius of each ring in mm, increasing (ring 0 may be the centre).
    mean_nm : (W, K) mean thickness of the usable sites of each ring, NaN if none.
    count : (W, K) number of usable sites per ring.
    """

    radius_mm: np.ndarray
    mean_nm: np.ndarray
    count: np.ndarray


def radial_profile(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm,
                   ring_tol_mm=1.0):
    """Mean thickness by radius ring, from the usable sites inside the edge exclusion.

    Sites are grouped into rings by radius: sorted radii closer than
    ``ring_tol_mm`` to their neighbour belong to the same ring, so any
    pattern (not only the built-in ones) is handled.

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
    ring_tol_mm : float
        Largest radial gap in mm within one ring.

    Returns
    -------
    RadialProfile
        For a single wafer (1-D input) ``mean_nm`` and ``count`` have shape (K,).

    References
    ----------
    .. [1] Common practice, no source: ring-averaged radial thickness profile.
    """
    t, good, x, y, single = lot_arrays(thickness_nm, ok, x_mm, y_mm)
    d, ee = check_wafer(diameter_mm, edge_exclusion_mm)
    if not float(ring_tol_mm) > 0:
        raise FilmmapInputError("ring_tol_mm must be > 0", field="ring_tol_mm")
    inside = inside_edge_exclusion(x, y, d, ee)
    r = np.hypot(x, y)
    idx = np.nonzero(inside)[0]
    idx = idx[np.argsort(r[idx], kind="stable")]
    label = np.concatenate([[0], np.cumsum(np.diff(r[idx]) > ring_tol_mm)]) if idx.size else []
    K = int(label[-1]) + 1 if idx.size else 0
    member = np.zeros((x.size, K))
    member[idx, label] = 1.0
    radius = (r @ member) / np.maximum(member.sum(0), 1)
    use = (good & inside).astype(float)
    count = use @ member
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = (np.where(good & inside, t, 0.0) @ member) / count
    count = count.astype(int)
    if single:
        mean, count = mean[0], count[0]
    return RadialProfile(radius, mean, count)
