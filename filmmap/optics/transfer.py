"""Reflection of an isotropic multilayer: the Fresnel-Airy recursion, batched.

Core of filmmap's optics, as pure functions on numpy arrays. Every function
broadcasts: wavelengths lie on the last axis and any leading axes (points,
spectra, candidate thicknesses) broadcast through, so a whole lot is one call
with no Python loop per spectrum or per wavelength.

Conventions (pinned): wavelengths and thicknesses in nm, angles in degrees,
complex index N = n - ik with k >= 0 for absorption (time factor exp(+i w t)),
Fresnel coefficients as in Azzam & Bashara (1977), so that rho = r_p / r_s is
-1 for a bare transparent substrate at normal incidence (Delta = 180 deg).
"""

from __future__ import annotations

import numpy as np

_TWO_PI = 2.0 * np.pi


def normal_wavevector(N, N0, sin_theta0):
    """Normalised normal component q = N cos(theta) in each medium (Snell's law).

    Parameters
    ----------
    N : array_like of complex
        Complex index (N = n - ik) of the medium.
    N0 : array_like of complex
        Index of the (transparent) ambient.
    sin_theta0 : float or array_like
        Sine of the angle of incidence in the ambient.

    Returns
    -------
    numpy.ndarray of complex
        q = sqrt(N^2 - (N0 sin theta0)^2) on the branch of the forward,
        decaying wave: Im(q) <= 0 (for exp(+i w t) and N = n - ik), and
        Re(q) >= 0 when the wave is propagating without loss.

    References
    ----------
    .. [1] R. M. A. Azzam and N. M. Bashara, Ellipsometry and Polarized Light
       (North-Holland, 1977), sect. 4.2.
    .. [2] S. J. Byrnes, "Multilayer optical calculations", arXiv:1603.02720
       (2016), appendix D (choice of the forward branch).
    """
    N = np.asarray(N, dtype=complex)
    beta = np.asarray(N0, dtype=complex) * sin_theta0
    q = np.sqrt(N * N - beta * beta)
    # numpy's principal root has Re >= 0; flip where it would grow (Im > 0), and
    # on the lossless cut keep Re >= 0 (already the principal choice)
    flip = (q.imag > 0) | ((q.imag == 0) & (q.real < 0))
    return np.where(flip, -q, q)


def interface_r(q_i, q_j, N_i, N_j, polarization):
    """Fresnel reflection coefficient of the interface i -> j.

    Parameters
    ----------
    q_i, q_j : array_like of complex
        N cos(theta) on each side.
    N_i, N_j : array_like of complex
        Complex indices on each side.
    polarization : {"s", "p"}

    Returns
    -------
    numpy.ndarray of complex

    References
    ----------
    .. [1] R. M. A. Azzam and N. M. Bashara (1977), eqs. 4.37-4.38:
       r_p = (N_j cos(theta_i) - N_i cos(theta_j)) / (N_j cos(theta_i) + N_i cos(theta_j)),
       r_s = (N_i cos(theta_i) - N_j cos(theta_j)) / (N_i cos(theta_i) + N_j cos(theta_j)).
    """
    if polarization == "s":
        return (q_i - q_j) / (q_i + q_j)
    if polarization == "p":
        a = N_j * N_j * q_i
        b = N_i * N_i * q_j
        return (a - b) / (a + b)
    raise ValueError(f"polarization must be 's' or 'p', got {polarization!r}")


def stack_r(wavelength_nm, N_ambient, N_layers, thickness_nm, N_substrate, angle_deg=0.0,
            polarization="s", derivatives=False):
    """Complex amplitude reflection coefficient of ambient / layers / substrate.

    Parameters
    ----------
    wavelength_nm : array_like, shape (..., n_wl)
        Vacuum wavelengths in nm (last axis).
    N_ambient : complex or array_like
        Index of the transparent incidence medium, broadcastable to the wavelengths.
    N_layers : sequence of array_like of complex
        Index of each layer, top layer first, each broadcastable to the wavelengths.
    thickness_nm : sequence of array_like
        Physical thickness of each layer in nm, each broadcastable against the
        wavelengths, e.g. shape (n_spectra, 1).
    N_substrate : array_like of complex
        Index of the semi-infinite substrate.
    angle_deg : float or array_like
        Angle of incidence in the ambient, degrees (broadcastable).
    polarization : {"s", "p"}
    derivatives : bool
        Also return d r / d thickness for every layer (per nm).

    Returns
    -------
    r : numpy.ndarray of complex
        Broadcast shape of all inputs.
    dr : list of numpy.ndarray, only if ``derivatives``
        dr/dd_j for each layer j, in 1/nm.

    Notes
    -----
    Works bottom-up with the Airy summation
    r_{j-1} = (r_{j-1,j} + r_j phi_j) / (1 + r_{j-1,j} r_j phi_j),
    phi_j = exp(-2 i beta_j), beta_j = 2 pi d_j q_j / lambda, which is
    algebraically identical to the product of Abeles characteristic matrices
    and better conditioned for thick absorbing layers (phi_j -> 0, no overflow).
    Derivatives are carried forward-mode through the same recursion.

    References
    ----------
    .. [1] M. Born and E. Wolf, Principles of Optics, 7th ed. (1999), sect. 1.6.
    .. [2] R. M. A. Azzam and N. M. Bashara (1977), sect. 4.3.
    .. [3] O. S. Heavens, Optical Properties of Thin Solid Films (1955).
    """
    wl = np.asarray(wavelength_nm, dtype=float)
    theta = np.deg2rad(np.asarray(angle_deg, dtype=float))
    N0 = np.asarray(N_ambient, dtype=complex)
    sin0 = np.sin(theta)
    q0 = normal_wavevector(N0, N0, sin0)
    Ns = [np.asarray(n, dtype=complex) for n in N_layers]
    qs = [normal_wavevector(n, N0, sin0) for n in Ns]
    Nsub = np.asarray(N_substrate, dtype=complex)
    qsub = normal_wavevector(Nsub, N0, sin0)
    if len(thickness_nm) != len(Ns):
        raise ValueError(f"{len(Ns)} layer indices but {len(thickness_nm)} thicknesses")

    media_N = [N0] + Ns + [Nsub]
    media_q = [q0] + qs + [qsub]
    n_layers = len(Ns)
    r = interface_r(media_q[-2], media_q[-1], media_N[-2], media_N[-1], polarization)
    dr = [None] * n_layers
    k0 = _TWO_PI / wl
    for j in range(n_layers, 0, -1):  # layer j sits between media j-1 and j+1
        d = np.asarray(thickness_nm[j - 1], dtype=float)
        kz = k0 * media_q[j]
        phi = np.exp(-2j * kz * d)
        a = interface_r(media_q[j - 1], media_q[j], media_N[j - 1], media_N[j], polarization)
        x = r * phi
        denom = 1.0 + a * x
        new_r = (a + x) / denom
        if derivatives:
            dfdx = (1.0 - a * a) / (denom * denom)
            for k in range(j, n_layers):
                if dr[k] is not None:
                    dr[k] = dfdx * phi * dr[k]
            dr[j - 1] = dfdx * x * (-2j * kz)
        r = new_r
    if derivatives:
        shape = np.broadcast(r, *[np.asarray(t) for t in thickness_nm]).shape
        r = np.broadcast_to(r, shape)
        dr = [np.broadcast_to(g, shape) for g in dr]
        return r, dr
    return r


def reflectance_from_r(r_s, r_p=None, polarization="u"):
    """Power reflectance from amplitude coefficients.

    Parameters
    ----------
    r_s, r_p : array_like of complex
        Amplitude coefficients (``r_p`` needed for "p" and "u").
    polarization : {"s", "p", "u"}
        "u" = unpolarised, the mean of R_s and R_p.
    """
    if polarization == "s":
        return np.abs(r_s) ** 2
    if polarization == "p":
        return np.abs(r_p) ** 2
    if polarization == "u":
        return 0.5 * (np.abs(r_s) ** 2 + np.abs(r_p) ** 2)
    raise ValueError(f"polarization must be 's', 'p' or 'u', got {polarization!r}")


def psi_delta_from_rho(rho):
    """Ellipsometric angles from rho = r_p / r_s = tan(Psi) exp(i Delta).

    Parameters
    ----------
    rho : array_like of complex

    Returns
    -------
    psi_deg : numpy.ndarray
        Psi in degrees, in [0, 90].
    delta_deg : numpy.ndarray
        Delta in degrees, in [0, 360).

    References
    ----------
    .. [1] R. M. A. Azzam and N. M. Bashara (1977), eq. 4.82.
    .. [2] H. G. Tompkins, A User's Guide to Ellipsometry (1993), ch. 2.
    """
    rho = np.asarray(rho, dtype=complex)
    psi = np.degrees(np.arctan(np.abs(rho)))
    delta = np.mod(np.degrees(np.angle(rho)), 360.0)
    # angle() gives (-180, 180]; mod maps -0.0 and float dust at 360 onto [0, 360)
    delta = np.where(delta >= 360.0, 0.0, delta)
    return psi, delta


def _single_lossless_film_R(wavelength_nm, N_ambient, N_film, thickness_nm, N_substrate,
                            angle_deg, polarization, derivatives):
    """R of one transparent film on any substrate, in real arithmetic (fast path).

    With a real ambient/film coefficient a = r_01 and r_12 = rho exp(i psi),
    the Airy sum gives R = (a^2 + rho^2 + 2 a rho c) / (1 + a^2 rho^2 + 2 a rho c),
    c = cos(psi - delta), delta = 4 pi d q_1 / lambda (Heavens 1955; Born & Wolf
    1999, sect. 1.6.4): one cosine per point instead of complex exponentials and
    a complex division. Returns None when the film is evanescent (q_1 not real),
    so the caller falls back to the general recursion.
    """
    wl = np.asarray(wavelength_nm, dtype=float)
    sin0 = np.sin(np.deg2rad(np.asarray(angle_deg, dtype=float)))
    N0 = np.asarray(N_ambient, dtype=complex)
    N1 = np.asarray(N_film, dtype=complex)
    N2 = np.asarray(N_substrate, dtype=complex)
    q0 = normal_wavevector(N0, N0, sin0)
    q1 = normal_wavevector(N1, N0, sin0)
    if np.any(q1.imag != 0):
        return None
    q2 = normal_wavevector(N2, N0, sin0)
    a = interface_r(q0, q1, N0, N1, polarization).real
    r12 = interface_r(q1, q2, N1, N2, polarization)
    rho = np.abs(r12)
    psi = np.angle(r12)
    k1 = 4.0 * np.pi * q1.real / wl
    two_a_rho = 2.0 * a * rho
    num_const = a * a + rho * rho
    den_const = 1.0 + (a * rho) ** 2
    d = np.asarray(thickness_nm, dtype=float)
    shape = np.broadcast_shapes(d.shape, k1.shape, psi.shape, two_a_rho.shape)
    # in-place arithmetic: this is the hot loop of every fit, one pass per operation
    arg = np.empty(shape)
    np.multiply(d, -k1, out=arg)
    arg += psi
    t = np.cos(arg)
    t *= two_a_rho
    den = t + den_const
    t += num_const
    R = np.divide(t, den, out=t)
    if not derivatives:
        return R, None
    # dR/dc = 2 a rho (den - num) / den^2 and dc/dd = k1 sin(arg)
    dR = np.sin(arg, out=arg)
    dR *= two_a_rho * (den_const - num_const) * k1
    den *= den
    dR /= den
    return R, [dR]


def reflectance(wavelength_nm, N_ambient, N_layers, thickness_nm, N_substrate, angle_deg=0.0,
                polarization="u", derivatives=False):
    """Power reflectance R of a multilayer, and optionally dR/dd for each layer.

    Parameters
    ----------
    wavelength_nm, N_ambient, N_layers, thickness_nm, N_substrate, angle_deg
        As in `stack_r`.
    polarization : {"s", "p", "u"}
        "u" (default) = unpolarised.
    derivatives : bool
        Also return dR/dd_j (1/nm) for each layer.

    Returns
    -------
    R : numpy.ndarray
        Reflectance as a fraction 0-1.
    dR : list of numpy.ndarray, only if ``derivatives``

    References
    ----------
    .. [1] M. Born and E. Wolf, Principles of Optics (1999), sect. 1.6.
    """
    if polarization not in ("s", "p", "u"):
        raise ValueError(f"polarization must be 's', 'p' or 'u', got {polarization!r}")
    normal = np.all(np.asarray(angle_deg) == 0.0)
    pols = ["s"] if (normal or polarization == "s") else (["p"] if polarization == "p" else ["s", "p"])
    single_lossless = (len(N_layers) == 1 and np.all(np.imag(N_layers[0]) == 0)
                       and np.all(np.imag(N_ambient) == 0))
    Rs, dRs = [], []
    for pol in pols:
        if single_lossless:
            out = _single_lossless_film_R(wavelength_nm, N_ambient, N_layers[0], thickness_nm[0],
                                          N_substrate, angle_deg, pol, derivatives)
            if out is not None:
                Rs.append(out[0])
                dRs.append(out[1])
                continue
        out = stack_r(wavelength_nm, N_ambient, N_layers, thickness_nm, N_substrate, angle_deg,
                      pol, derivatives)
        if derivatives:
            r, dr = out
            Rs.append(np.abs(r) ** 2)
            # d|r|^2 = 2 Re(conj(r) dr)
            dRs.append([2.0 * (r.real * g.real + r.imag * g.imag) for g in dr])
        else:
            Rs.append(np.abs(out) ** 2)
            dRs.append(None)
    # at normal incidence R_s = R_p, so one polarisation serves all three
    R = Rs[0] if len(Rs) == 1 else 0.5 * (Rs[0] + Rs[1])
    if not derivatives:
        return R
    dR = dRs[0] if len(dRs) == 1 else [0.5 * (a + b) for a, b in zip(*dRs)]
    return R, dR


def psi_delta(wavelength_nm, N_ambient, N_layers, thickness_nm, N_substrate, angle_deg,
              derivatives=False):
    """Ellipsometric Psi and Delta (degrees), and optionally their thickness derivatives.

    Parameters
    ----------
    wavelength_nm, N_ambient, N_layers, thickness_nm, N_substrate, angle_deg
        As in `stack_r`.
    derivatives : bool
        Also return dPsi/dd_j and dDelta/dd_j in degrees per nm.

    Returns
    -------
    psi_deg, delta_deg : numpy.ndarray
        Psi in [0, 90], Delta in [0, 360).
    dpsi, ddelta : list of numpy.ndarray, only if ``derivatives``

    Notes
    -----
    With dln(rho) = dr_p/r_p - dr_s/r_s: dPsi = sin(Psi) cos(Psi) Re(dln rho)
    and dDelta = Im(dln rho) (radians), from tan(Psi) = |rho|, Delta = arg(rho).

    References
    ----------
    .. [1] R. M. A. Azzam and N. M. Bashara (1977), sect. 4.3.
    """
    args = (wavelength_nm, N_ambient, N_layers, thickness_nm, N_substrate, angle_deg)
    if not derivatives:
        rs = stack_r(*args, polarization="s")
        rp = stack_r(*args, polarization="p")
        return psi_delta_from_rho(rp / rs)
    rs, drs = stack_r(*args, polarization="s", derivatives=True)
    rp, drp = stack_r(*args, polarization="p", derivatives=True)
    psi, delta = psi_delta_from_rho(rp / rs)
    psi_rad = np.radians(psi)
    half_sin2psi = 0.5 * np.sin(2.0 * psi_rad)
    dpsi, ddelta = [], []
    for gs, gp in zip(drs, drp):
        dln = gp / rp - gs / rs
        dpsi.append(np.degrees(half_sin2psi * dln.real))
        ddelta.append(np.degrees(dln.imag))
    return psi, delta, dpsi, ddelta
