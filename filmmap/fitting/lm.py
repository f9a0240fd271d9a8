"""Batched Levenberg-Marquardt: many small least-squares problems in lock step."""

from __future__ import annotations

import numpy as np


def weighted_residual(model, P, y, sqrt_w, jacobian):
    """Weighted residuals (n, M) = sqrt(w) * (y - f(P)), Delta differences wrapped.

    Returns (r, Jw) with Jw = sqrt(w) * df/dP of shape (n, p, M) when ``jacobian``.
    """
    from filmmap.fitting.model import ELLIPSOMETRY, wrap_delta_difference

    if not jacobian:
        f, J = model.evaluate(P), None
    else:
        # the model folds the weights into its Jacobian rows as it makes them
        f, J = model.evaluate(P, jacobian=True, sqrt_w=sqrt_w)
    r = np.subtract(y, f)
    if model.technique == ELLIPSOMETRY:
        r = wrap_delta_difference(r, model.wavelength_nm.size)
    r *= sqrt_w
    if not jacobian:
        return r, None
    return r, J


def levenberg_marquardt(model, P0, y, sqrt_w, lo, hi, xtol, max_iter=30, ftol=1e-12,
                        prior_mean=None, prior_weight=None):
    """Minimise sum(r^2) (+ Gaussian priors) for each row of P0 independently, all rows at once.

    Parameters
    ----------
    model : SpectralModel
        Forward model.
    P0 : numpy.ndarray, shape (n, p)
        Starting values.
    y : numpy.ndarray, shape (n, M)
        Data.
    sqrt_w : numpy.ndarray, shape (n, M)
        Square roots of the weights (1/sigma); 0 masks a point.
    lo, hi : numpy.ndarray, shape (p,)
        Bounds; steps are clipped into them (projected LM).
    xtol : numpy.ndarray, shape (p,)
        Absolute step tolerance per parameter (e.g. 0.01 nm for a thickness):
        once every Gauss-Newton step component is below it, the step is applied
        and the row stops. Near the minimum the error after a Gauss-Newton step
        is of the order of the step squared over the basin width, so the final
        error is far below xtol.
    max_iter : int
        Iteration limit per row.
    ftol : float
        Also converged when the relative chi-square decrease of an accepted step <= ftol.
    prior_mean, prior_weight : numpy.ndarray, shape (p,), optional
        Gaussian priors: each parameter with prior_weight = 1/sigma_prior^2 > 0 adds
        the residual (P - prior_mean) / sigma_prior (regularised least squares; a
        weight of 0 means no prior).

    Returns
    -------
    P : numpy.ndarray (n, p)
    chi2 : numpy.ndarray (n,)
        Weighted sum of squared residuals at P, priors included.
    JTJ : numpy.ndarray (n, p, p)
        Gauss-Newton curvature at the last evaluated point, priors included (its
        inverse is the covariance of the regularised problem).
    r : numpy.ndarray (n, M)
        Weighted residual at the last evaluated point.
    iterations : numpy.ndarray (n,) of int
    converged : numpy.ndarray (n,) of bool

    Notes
    -----
    Each iteration costs one model evaluation with derivatives per active
    row: the trial point's Jacobian is computed together with its residual and
    reused as the next linearisation when the step is accepted. Rows leave the
    active set as they converge.

    References
    ----------
    .. [1] K. Levenberg, Q. Appl. Math. 2, 164 (1944).
    .. [2] D. W. Marquardt, J. SIAM 11, 431 (1963).
    .. [3] J. Nocedal and S. J. Wright, Numerical Optimization, 2nd ed. (2006), ch. 10.
    """
    P = np.array(P0, dtype=float, copy=True)
    n, p = P.shape
    if prior_weight is None or not np.any(prior_weight):
        prior_mean = prior_weight = None
    else:
        prior_mean = np.asarray(prior_mean, dtype=float)
        prior_weight = np.asarray(prior_weight, dtype=float)
        prior_diag = np.diag(prior_weight)

    def normal_equations(Jw, r, Pr):
        """chi2, J^T J and gradient J^T r of data plus priors."""
        chi2_ = np.einsum("nm,nm->n", r, r)
        JTJ_ = _gram(Jw)
        grad_ = np.matmul(Jw, r[:, :, None])[:, :, 0]
        if prior_weight is not None:
            dev = Pr - prior_mean
            chi2_ += np.einsum("ni,i,ni->n", dev, prior_weight, dev)
            JTJ_ += prior_diag
            grad_ -= dev * prior_weight
        return chi2_, JTJ_, grad_

    r, Jw = weighted_residual(model, P, y, sqrt_w, True)
    chi2, JTJ, grad = normal_equations(Jw, r, P)
    # the weighted Jacobian at each row's current point, for the linear final step
    Jw_keep = Jw if getattr(model, "linear_step", None) is not None else None
    lam = np.full(n, 1e-4)
    iterations = np.zeros(n, dtype=int)
    converged = np.zeros(n, dtype=bool)
    active = np.arange(n)
    eye = np.eye(p)
    for _ in range(max_iter):
        if active.size == 0:
            break
        A = JTJ[active]
        diag = np.einsum("nii->ni", A)
        # Marquardt's scaling by the curvature diagonal, with a floor so a
        # parameter with no sensitivity still gets a bounded step
        damp = lam[active, None] * np.maximum(diag, 1e-12 * (1.0 + diag.max(axis=1, keepdims=True)))
        A = A + damp[:, :, None] * eye
        step = np.linalg.solve(A, grad[active][:, :, None])[:, :, 0]
        P_try = np.clip(P[active] + step, lo, hi)
        # a Gauss-Newton step this small means P is already within xtol of the
        # minimum: stop without paying for another model evaluation. A step whose
        # non-linear part is that small (the model's own test: linear parameters such
        # as a reflectance offset may move by any amount) is as final: the model is
        # linear over it, so its residual and chi-square follow from the Jacobian
        taken = P_try - P[active]
        small_step = np.all(np.abs(taken) <= xtol, axis=1)
        linear = getattr(model, "linear_step", None)
        if linear is not None:
            small_step |= linear(P[active], taken)
        tiny = (lam[active] <= 1e-3) & small_step
        if tiny.any():
            rows = active[tiny]
            converged[rows] = True
            P[rows] = P_try[tiny]
            if Jw_keep is not None:
                # r(P + s) = r(P) - Jw s to first order
                # (no gather of the Jacobian when every active row is in: the common case)
                if active.size == n:
                    upd = np.matmul(taken[:, None, :], Jw_keep)[:, 0, :]
                    if tiny.all():
                        r -= upd
                    else:
                        r[rows] -= upd[tiny]
                else:
                    r[rows] -= np.matmul(taken[tiny][:, None, :], Jw_keep[rows])[:, 0, :]
                chi2[rows] = np.einsum("nm,nm->n", r[rows], r[rows])
                if prior_weight is not None:
                    dev = P[rows] - prior_mean
                    chi2[rows] += np.einsum("ni,i,ni->n", dev, prior_weight, dev)
            active, P_try = active[~tiny], P_try[~tiny]
            if active.size == 0:
                break
        r_t, Jw_t = weighted_residual(model, P_try, y[active], sqrt_w[active], True)
        chi2_t, JTJ_t, grad_t = normal_equations(Jw_t, r_t, P_try)
        iterations[active] += 1
        ok = np.isfinite(chi2_t) & (chi2_t <= chi2[active])
        acc = active[ok]
        actual_step = np.abs(P_try - P[active])
        decrease = chi2[active] - chi2_t
        P[acc] = P_try[ok]
        chi2[acc] = chi2_t[ok]
        r[acc] = r_t[ok]
        JTJ[acc] = JTJ_t[ok]
        grad[acc] = grad_t[ok]
        if Jw_keep is not None:
            Jw_keep[acc] = Jw_t[ok]
        lam[acc] = np.maximum(lam[acc] * 0.3, 1e-9)
        lam[active[~ok]] *= 10.0
        small = np.all(actual_step <= xtol, axis=1)
        flat = decrease <= ftol * np.maximum(chi2[active], 1e-300)
        done = (ok & (small | flat)) | (~ok & (lam[active] > 1e12))
        # a rejected step that was already below xtol also means we are at the minimum
        done |= ~ok & small
        converged[active[done]] = True
        active = active[~done]
    return P, chi2, JTJ, r, iterations, converged


def _gram(Jw):
    """J^T J for a stack of parameter-major Jacobians (n, p, M), as one batched product."""
    if Jw.shape[1] == 1:
        return np.einsum("nm,nm->n", Jw[:, 0], Jw[:, 0])[:, None, None]
    return np.matmul(Jw, Jw.transpose(0, 2, 1))
