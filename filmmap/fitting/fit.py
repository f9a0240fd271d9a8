"""Fit film thicknesses to many spectra at once: global search, then local refinement.

The answer never depends on a starting value: every spectrum is scored
against a library of model spectra on a thickness grid covering the whole
search range (`filmmap.fitting.search`), each candidate basin (fringe order)
that could hold the best fit is refined by batched Levenberg-Marquardt
(`filmmap.fitting.lm`), and the refined candidates are compared. A result is
``ok`` only when one candidate is clearly best (or the nominal chooses among
equals), the fit converged inside the search bounds and fits the data.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.fitting.lm import levenberg_marquardt, weighted_residual
from filmmap.fitting.model import ELLIPSOMETRY, REFLECTANCE, FreeParameter, SpectralModel
from filmmap.fitting.search import build_library, grid_step_nm, local_minima, ncs, \
    parabolic_vertex, score_library

POOR_FIT_CHI2 = 10.0
"""Default limit on the reduced chi-square: an rms residual above about 3 noise sigmas
marks the fit "poor fit" (a flat or foreign spectrum fits no film that well)."""

MAX_GRID_POINTS = 20000
"""Largest global-search grid per thickness (about 0.3 mm of oxide at the default fineness)."""

DEFAULT_SEARCH_NM = (0.0, 6000.0)
"""Search range (nm) for a thickness with neither nominal nor search_nm given."""

NOMINAL_WINDOW = (0.5, 2.0)
"""With only a nominal d0, the search runs over [0.5 d0, 2 d0]."""

DEFAULT_REFLECTANCE_SIGMA = (1e-3, 3e-3)
"""Default reflectance noise: sigma_R = 0.001 + 0.003 R (absolute + relative), fraction."""

DEFAULT_PSI_DELTA_SIGMA_DEG = (0.05, 0.10)
"""Default ellipsometer noise: sigma_Psi = 0.05 deg, sigma_Delta = 0.10 deg."""

COMPARABLE_DCHI2 = 9.0
"""Two candidates are equally good when their chi-square differs by less than
this many units (a 3-sigma likelihood-ratio band), scaled up by the best
candidate's reduced chi-square when the data scatter more than the noise model."""


@dataclass
class FitResult:
    """Per-spectrum outcome of `fit_spectra`.

    Attributes
    ----------
    names : list of str
        Free parameter names, e.g. ``"thickness[SiO2]"``.
    values : numpy.ndarray (n, p)
        Fitted values; NaN where ``ok`` is False (a failed fit is not a number).
    unchecked_values : numpy.ndarray (n, p)
        The best candidate whatever the verdict, for inspection only.
    sigma : numpy.ndarray (n, p)
        Standard uncertainty: sqrt(diag((J^T W J)^-1) * reduced_chi2); NaN where not ok.
    reduced_chi2 : numpy.ndarray (n,)
        Goodness of fit: sum(w r^2) / (points - parameters), with w = 1/sigma^2 from
        the noise model; about 1 when the model explains the data to the noise.
    rms_residual : numpy.ndarray (n,)
        Root-mean-square of the unweighted residual, in data units (fraction of R,
        or degrees for Psi/Delta).
    iterations : numpy.ndarray (n,)
        Levenberg-Marquardt iterations of the chosen candidate.
    ok : numpy.ndarray (n,) of bool
    reason : numpy.ndarray (n,) of str
        Why not ok ("" when ok); a note also when the nominal chose among candidates.
    candidates : dict {int: numpy.ndarray}
        For the spectra that had a choice, the equally good values of the first
        thickness parameter that were left (spectra absent here had one).
    """

    names: list
    values: np.ndarray
    unchecked_values: np.ndarray
    sigma: np.ndarray
    reduced_chi2: np.ndarray
    rms_residual: np.ndarray
    iterations: np.ndarray
    ok: np.ndarray
    reason: np.ndarray
    candidates: dict = field(default_factory=dict)

    def __len__(self):
        return self.ok.size

    def value(self, name):
        """Column of ``values`` for a parameter name."""
        return self.values[:, self.names.index(name)]


def thickness_search_range(nominal=None, search_nm=None):
    """Search range for a thickness: search_nm, else a window around the nominal, else the default."""
    if search_nm is not None:
        lo, hi = (float(v) for v in search_nm)
        if not 0 <= lo < hi:
            raise ValueError(f"search_nm must satisfy 0 <= lo < hi, got {search_nm}")
        return lo, hi
    if nominal is not None:
        return NOMINAL_WINDOW[0] * float(nominal), NOMINAL_WINDOW[1] * float(nominal)
    return DEFAULT_SEARCH_NM


def free_parameters(stack, layers=None, nominal=None, search_nm=None, cauchy=(), scale=False,
                    offset=False):
    """The usual list of free parameters.

    Parameters
    ----------
    stack : filmmap.optics.Stack
    layers : sequence of int, optional
        Layers (top = 0) whose thickness is free; default all.
    nominal : dict {layer: nm} or float, optional
        Nominal thicknesses (a float applies to the top free layer).
    search_nm : dict {layer: (lo, hi)} or (lo, hi), optional
        Search ranges in nm (a pair applies to the top free layer).
    cauchy : sequence of (layer, "A" | "B")
        Cauchy coefficients to fit, started from the layer's values.
    scale, offset : bool
        Fit a reflectance calibration scale / offset nuisance parameter.
    """
    layers = list(range(len(stack.layers))) if layers is None else list(layers)
    if not layers and not cauchy:
        raise ValueError("nothing to fit: no free layer")
    top = layers[0] if layers else None
    if nominal is not None and not isinstance(nominal, dict):
        nominal = {top: nominal}
    if search_nm is not None and not isinstance(search_nm, dict):
        search_nm = {top: search_nm}
    nominal = nominal or {}
    search_nm = search_nm or {}
    out = []
    for j in layers:
        lo, hi = thickness_search_range(nominal.get(j), search_nm.get(j))
        out.append(FreeParameter("thickness", j, lo, hi, nominal.get(j),
                                 f"thickness[{stack.layers[j].name}]"))
    for j, coeff in cauchy:
        mat = stack.layers[j].material
        start = mat.A if coeff == "A" else mat.B_um2
        span = (1.0, 3.5) if coeff == "A" else (-0.2, 0.5)
        out.append(FreeParameter(f"cauchy_{coeff}", j, span[0], span[1], start,
                                 f"cauchy_{coeff}[{stack.layers[j].name}]"))
    if scale:
        out.append(FreeParameter("scale", None, 0.5, 1.5, 1.0, "scale"))
    if offset:
        out.append(FreeParameter("offset", None, -0.2, 0.2, 0.0, "offset"))
    return out


def default_sigma(technique, y, m):
    """Noise model used for weights when the user gives none (see module constants)."""
    if technique == REFLECTANCE:
        a, b = DEFAULT_REFLECTANCE_SIGMA
        return a + b * np.abs(y)
    sp, sd = DEFAULT_PSI_DELTA_SIGMA_DEG
    s = np.empty_like(y)
    s[:, :m] = sp
    s[:, m:] = sd
    return s


def _as_data(technique, data, m):
    if technique == REFLECTANCE:
        y = np.atleast_2d(np.asarray(data, dtype=float))
    else:
        psi, delta = data
        y = np.concatenate([np.atleast_2d(np.asarray(psi, dtype=float)),
                            np.atleast_2d(np.asarray(delta, dtype=float))], axis=1)
    expected = m if technique == REFLECTANCE else 2 * m
    if y.shape[1] != expected:
        raise ValueError(f"data has {y.shape[1]} columns per spectrum, expected {expected}")
    return y


def fit_spectra(stack, wavelength_nm, data, technique=REFLECTANCE, angle_deg=0.0, free=None,
                nominal=None, search_nm=None, sigma=None, mask=None, exclude_bands_nm=(),
                robust=False, poor_fit_chi2=POOR_FIT_CHI2, max_iter=40, max_candidates=32,
                polarization="u", grid_fineness=16.0, workers=None, block_rows=None):
    """Fit the free parameters of a stack to a batch of spectra.

    Parameters
    ----------
    stack : filmmap.optics.Stack
        Optical model; layer thicknesses serve as nominal for fixed layers.
    wavelength_nm : array_like (m,)
        Wavelength of each data column, nm.
    data : array_like (n, m), or (psi, delta) pair of (n, m) arrays
        Reflectance as a fraction 0-1, or Psi and Delta in degrees.
    technique : {"reflectance", "ellipsometry"}
    angle_deg : float or array_like (m,)
        Angle of incidence in degrees; per column for multi-angle data.
    free : list of FreeParameter, optional
        Default: every layer thickness free (see `free_parameters`).
    nominal, search_nm : optional
        Passed to `free_parameters` when ``free`` is None.
    sigma : array_like, optional
        Noise standard deviation per point, broadcastable to the data (fraction
        of R, or degrees; for ellipsometry shape (..., 2m): Psi then Delta).
        Default: `default_sigma`.
    mask : array_like of bool (m,) or (n, m), optional
        True = use the point. NaN data points are always masked.
    exclude_bands_nm : sequence of (lo, hi)
        Wavelength bands (nm, inclusive) left out of the fit.
    robust : bool
        Down-weight outliers (spikes) by iteratively reweighted least squares
        with Huber weights (Huber 1964), c = 1.345 robust sigmas.
    poor_fit_chi2 : float
        A reduced chi-square above this marks the fit "poor fit".
    max_iter : int
        Levenberg-Marquardt iteration limit.
    max_candidates : int
        At most this many candidate basins refined per spectrum.
    polarization : {"u", "s", "p"}
        Reflectance polarisation (unpolarised by default).
    grid_fineness : float
        Grid points per shortest in-film half-wave in the global search.
    workers : int, optional
        Threads sharing the work (default: up to 2, this project's core count).
    block_rows : int, optional
        Spectra per block (default: the batch split evenly over the workers, at most
        4096); bounds the memory of one block (about 0.2 GB at 4096 x 601 points).

    Returns
    -------
    FitResult

    References
    ----------
    .. [1] D. W. Marquardt, J. SIAM 11, 431 (1963) (local refinement).
    .. [2] P. R. Bevington and D. K. Robinson, Data Reduction and Error Analysis
       for the Physical Sciences, 3rd ed. (2003), ch. 8 (uncertainties from the
       curvature matrix scaled by the reduced chi-square).
    .. [3] P. J. Huber, Ann. Math. Stat. 35, 73 (1964) (robust weights).
    """
    wl = np.asarray(wavelength_nm, dtype=float)
    m = wl.size
    if free is None:
        free = free_parameters(stack, nominal=nominal, search_nm=search_nm)
    model = SpectralModel(stack, wl, angle_deg, technique, free, polarization)
    y = _as_data(technique, data, m)
    n, M = y.shape
    p = len(free)

    s_all = None if sigma is None else np.broadcast_to(np.asarray(sigma, dtype=float), y.shape)
    col_use = np.ones(m, dtype=bool)
    for lo_b, hi_b in exclude_bands_nm:
        col_use &= ~((wl >= lo_b) & (wl <= hi_b))
    mk = None if mask is None else np.broadcast_to(np.asarray(mask, dtype=bool), (n, m))

    lo = np.array([f.lo for f in free])
    hi = np.array([f.hi for f in free])

    # --- global search: one library over the thickness parameters -----------
    grids = []
    for f in free:
        if f.kind == "thickness":
            step = grid_step_nm(model, f.layer, grid_fineness)
            count = max(2, int(np.ceil((f.hi - f.lo) / step)) + 1)
            if count > MAX_GRID_POINTS:
                raise FilmmapInputError(
                    f"search range {f.lo:g}-{f.hi:g} nm of {f.name} needs {count} grid points "
                    f"(more than {MAX_GRID_POINTS}); expected a range a film can have",
                    field="search_nm")
            grids.append(np.linspace(f.lo, f.hi, count))
        else:
            grids.append(np.array([f.start]))
    points, library = build_library(model, grids)
    ctx = dict(model=model, m=m, p=p, free=free, grids=grids, shape=[g.size for g in grids],
               points=points, library=library, lo=lo, hi=hi, xtol=np.array([f.xtol for f in free]),
               max_iter=max_iter, max_candidates=max_candidates, robust=robust,
               col_use=np.tile(col_use, M // m), grid_weight=None)
    if technique == REFLECTANCE and s_all is None and mk is None:
        # the search only ranks basins, so one weight per column serves all spectra
        # (one matrix product instead of two); it comes from the lot's median spectrum
        # so no block sees a different one. The refinement uses each spectrum's weights.
        sample = y[:: max(1, n // 256)]
        sample = sample[np.all(np.isfinite(sample), axis=1)]
        typical = np.median(sample, axis=0) if sample.size else np.full(M, 0.3)
        ctx["grid_weight"] = np.where(ctx["col_use"], 1.0 / default_sigma(technique, typical[None], m)[0] ** 2, 0.0)

    def run(sl):
        return _search_and_refine(ctx, y[sl], None if s_all is None else s_all[sl],
                                  None if mk is None else mk[sl])

    if workers is None:
        workers = min(2, os.cpu_count() or 1)
    if block_rows is None:
        block_rows = max(1, min(4096, -(-n // workers)))
    blocks = [slice(a, min(a + block_rows, n)) for a in range(0, n, block_rows)]
    if workers > 1 and len(blocks) > 1:
        # numpy's elementwise kernels and BLAS release the GIL: threads share the library
        with ThreadPoolExecutor(workers) as pool:
            parts = list(pool.map(run, blocks))
    else:
        parts = [run(sl) for sl in blocks]

    def cat(key):
        return np.concatenate([q[key] for q in parts])

    values_raw, sigma_out, red, rms = cat("values"), cat("sigma"), cat("reduced_chi2"), cat("rms")
    it_sel, conv_sel, n_used, reason = cat("iterations"), cat("converged"), cat("n_used"), cat("reason")
    cond_ok = cat("cond_ok")
    candidates = {}
    for sl, q in zip(blocks, parts):
        candidates.update({sl.start + k: v for k, v in q["candidates"].items()})

    # --- verdicts -------------------------------------------------------------
    ok = np.ones(n, dtype=bool)

    def fail(cond, text):
        cond = cond & ok
        for k in np.nonzero(cond)[0]:
            reason[k] = text(k) if callable(text) else text
        ok[cond] = False

    fail(n_used <= p, "no usable data: too few finite points in the spectrum")
    fail(np.array([r.startswith("ambiguous") for r in reason], dtype=bool), lambda k: reason[k])
    fail(~conv_sel, lambda k: f"did not converge in {it_sel[k]} iterations")
    span = hi - lo
    at_lo = np.isclose(values_raw, lo, rtol=0, atol=1e-6 * span + 1e-9)
    at_hi = np.isclose(values_raw, hi, rtol=0, atol=1e-6 * span + 1e-9)
    fail(np.any(at_lo | at_hi, axis=1), lambda k: "at search bound: " + ", ".join(
        f"{free[i].name} = {values_raw[k, i]:.4g} at {'lower' if at_lo[k, i] else 'upper'} bound"
        for i in range(p) if at_lo[k, i] or at_hi[k, i]) + "; widen search_nm")
    fail(red > poor_fit_chi2, lambda k: f"poor fit: reduced chi-square {red[k]:.3g} > {poor_fit_chi2:g}")
    fail(~np.all(np.isfinite(sigma_out), axis=1) | ~cond_ok,
         "uncertainty undefined: parameters not determined by the data")

    values = np.where(ok[:, None], values_raw, np.nan)
    sigma_final = np.where(ok[:, None], sigma_out, np.nan)
    return FitResult(names=[f.name for f in free], values=values, unchecked_values=values_raw,
                     sigma=sigma_final, reduced_chi2=red, rms_residual=rms, iterations=it_sel,
                     ok=ok, reason=reason.astype(str), candidates=candidates)


def _prepare(ctx, y, s, mk):
    """Weights and masks of one block: masked points get weight 0 and value 0."""
    model, m = ctx["model"], ctx["m"]
    finite = np.isfinite(y)
    clean = finite.all() and mk is None and ctx["col_use"].all()
    if s is None and model.technique == REFLECTANCE and clean:
        # the common case, all points usable under the default noise model:
        # 1 / (a + b |R|) in place, no masked copies of the data
        a, b = DEFAULT_REFLECTANCE_SIGMA
        sqrt_w = np.abs(y)
        sqrt_w *= b
        sqrt_w += a
        np.reciprocal(sqrt_w, out=sqrt_w)
        return y, sqrt_w, np.ones(y.shape, dtype=bool)
    if s is None:
        s = default_sigma(model.technique, y, m)
    use = finite & np.isfinite(s) & (s > 0)
    if mk is not None:
        use &= np.tile(mk, (1, y.shape[1] // m))
    use &= ctx["col_use"][None, :]
    y_clean = np.where(use, y, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        sqrt_w = np.where(use, 1.0 / s, 0.0)
    return y_clean, sqrt_w, use


def _search_and_refine(ctx, y, s, mk):
    """Global search, candidate refinement, robust pass and uncertainties for one block."""
    model, m, p, free = ctx["model"], ctx["m"], ctx["p"], ctx["free"]
    grids, shape, points, library = ctx["grids"], ctx["shape"], ctx["points"], ctx["library"]
    lo, hi, xtol = ctx["lo"], ctx["hi"], ctx["xtol"]
    technique, max_iter, max_candidates = model.technique, ctx["max_iter"], ctx["max_candidates"]
    y_clean, sqrt_w, use = _prepare(ctx, y, s, mk)
    n = y_clean.shape[0]
    n_used = use.sum(axis=1)
    if technique == ELLIPSOMETRY:
        y_s = ncs(y_clean, m)
        # N, C, S carry about 2 sigma_Psi (rad) of noise each (Fujiwara 2007, sect. 3.4)
        sig_ncs = 2.0 * np.radians(DEFAULT_PSI_DELTA_SIGMA_DEG[0])
        u = use[:, :m] & use[:, m:]
        w_s = np.tile(np.where(u, 1.0 / sig_ncs**2, 0.0), (1, 3))
    elif ctx["grid_weight"] is not None:
        y_s, w_s = y_clean, np.where(use, ctx["grid_weight"], 0.0)
        if use.all():
            w_s = ctx["grid_weight"]
    else:
        y_s, w_s = y_clean, sqrt_w**2
    chi2_grid = score_library(y_s, w_s, library)
    # --- candidate basins ---------------------------------------------------
    minima = local_minima(chi2_grid, shape)
    masked = np.where(minima, chi2_grid, np.inf)
    K = min(max_candidates, masked.shape[1])
    top = np.argpartition(masked, K - 1, axis=1)[:, :K] if K < masked.shape[1] else \
        np.tile(np.arange(masked.shape[1]), (n, 1))
    top_chi2 = np.take_along_axis(masked, top, axis=1)
    order = np.argsort(top_chi2, axis=1)
    top = np.take_along_axis(top, order, axis=1)
    top_chi2 = np.take_along_axis(top_chi2, order, axis=1)
    searched = [i for i, g in enumerate(grids) if g.size > 1]
    starts = points[top]  # (n, K, p)
    est = top_chi2.copy()
    if len(searched) == 1:
        i = searched[0]
        valid = np.isfinite(top_chi2)
        r_idx = np.nonzero(valid)[0]
        gx, gc = parabolic_vertex(grids[i], chi2_grid, r_idx, top[valid])
        starts[valid, i] = gx
        est[valid] = gc
    best_est = est[:, :1]
    # a basin is worth refining when its estimated minimum is near the best one, or
    # deep compared with the whole chi-square landscape (periodic data: every basin is
    # a near-perfect fit, but the grid misses the narrow minima by varying amounts);
    # wrong fringe orders of broadband spectra sit at 25-40 % of the landscape's height
    depth = 0.02 * np.max(np.where(np.isfinite(chi2_grid), chi2_grid, 0.0), axis=1, keepdims=True)
    keep = np.isfinite(est) & ((est <= 3.0 * best_est + 100.0) | (est <= depth))
    keep[:, 0] = True
    rows, cols = np.nonzero(keep)
    P0 = starts[rows, cols]
    for i, f in enumerate(free):
        if f.kind != "thickness" and f.start is not None:
            P0[:, i] = f.start

    # --- local refinement of every kept candidate, all in one batch ---------
    # one candidate per spectrum is the common case: then no copy of the data is needed
    single = rows.size == n and np.array_equal(rows, np.arange(n))
    Pc, chi2c, JTJc, rc, itc, convc = levenberg_marquardt(
        model, P0, y_clean if single else y_clean[rows], sqrt_w if single else sqrt_w[rows],
        lo, hi, xtol, max_iter=max_iter)

    # --- choose per spectrum --------------------------------------------------
    dof = np.maximum(n_used - p, 1)
    best_chi2 = np.full(n, np.inf)
    np.minimum.at(best_chi2, rows, chi2c)
    is_best = chi2c == best_chi2[rows]
    best_of = np.full(n, len(rows))
    np.minimum.at(best_of, rows[is_best], np.nonzero(is_best)[0])
    red_best = best_chi2 / dof
    band = COMPARABLE_DCHI2 * np.maximum(1.0, red_best)
    comparable = chi2c <= best_chi2[rows] + band[rows]

    thick_idx = next((i for i, f in enumerate(free) if f.kind == "thickness"), 0)
    nominal_first = free[thick_idx].start
    values_raw = Pc[best_of]
    r_sel = rc if single else rc[best_of]
    chi2_sel = chi2c[best_of]
    JTJ_sel = JTJc[best_of]
    it_sel = itc[best_of]
    conv_sel = convc[best_of]
    reason = np.full(n, "", dtype=object)
    # spectra with several comparable candidates are few: handle them row by row
    cand_rows = np.bincount(rows[comparable], minlength=n)
    for s_i in np.nonzero(cand_rows > 1)[0]:
        sel = np.nonzero((rows == s_i) & comparable)[0]
        vals = Pc[sel, thick_idx]
        order_v = np.argsort(vals)
        sel, vals = sel[order_v], vals[order_v]
        distinct = np.concatenate([[True], np.diff(vals) > 1.0])
        sel, vals = sel[distinct], vals[distinct]
        if sel.size <= 1:
            continue
        if nominal_first is not None:
            pick = sel[np.argmin(np.abs(vals - nominal_first))]
            best_of[s_i] = pick
            values_raw[s_i], chi2_sel[s_i], JTJ_sel[s_i] = Pc[pick], chi2c[pick], JTJc[pick]
            r_sel[s_i] = rc[pick]
            it_sel[s_i], conv_sel[s_i] = itc[pick], convc[pick]
            reason[s_i] = (f"note: nominal chose {Pc[pick, thick_idx]:.2f} nm among "
                           f"{sel.size} equally good candidates")
        else:
            reason[s_i] = (f"ambiguous: {sel.size} equally good candidates "
                           + ", ".join(f"{v:.1f}" for v in vals[:8]) + (" ..." if sel.size > 8 else "")
                           + " nm; give a nominal or more wavelengths/angles")
    # candidates left, for the few spectra where there was a choice
    candidates = {}
    for s_i in np.nonzero(cand_rows > 1)[0]:
        if reason[s_i]:
            sel = np.nonzero((rows == s_i) & comparable)[0]
            candidates[int(s_i)] = np.unique(np.round(Pc[sel, thick_idx], 3))

    # --- robust re-weighting on the chosen candidate -------------------------
    sw = sqrt_w
    if ctx["robust"]:
        for _ in range(3):
            r, _j = weighted_residual(model, values_raw, y_clean, sw, False)
            med = np.median(np.where(sw > 0, np.abs(r), np.nan), axis=1)
            scale = np.nan_to_num(1.4826 * med, nan=1.0)[:, None]
            u = np.abs(r) / np.maximum(scale, 1e-300)
            huber = np.where(u <= 1.345, 1.0, 1.345 / np.maximum(u, 1e-300))
            sw = sqrt_w * np.sqrt(huber)
            values_raw, chi2_sel, JTJ_sel, r_sel, it2, conv_sel = levenberg_marquardt(
                model, values_raw, y_clean, sw, lo, hi, xtol, max_iter=max_iter)
            it_sel = it_sel + it2

    # --- uncertainty: curvature scaled by the reduced chi-square ------------
    dof = np.maximum(n_used - p, 1)
    red = chi2_sel / dof
    cov_diag = np.full((n, p), np.nan)
    cond_ok = np.zeros(n, dtype=bool)
    finite = np.all(np.isfinite(JTJ_sel), axis=(1, 2))
    for k in (np.nonzero(finite)[0],) if finite.any() else ():
        try:
            inv = np.linalg.inv(JTJ_sel[k])
            cond_ok[k] = True
        except np.linalg.LinAlgError:
            inv = np.full_like(JTJ_sel[k], np.nan)
            for j, kk in enumerate(k):
                try:
                    inv[j] = np.linalg.inv(JTJ_sel[kk])
                    cond_ok[kk] = True
                except np.linalg.LinAlgError:
                    pass
        cov_diag[k] = np.einsum("nii->ni", inv) * red[k, None]
    with np.errstate(invalid="ignore"):
        sigma_out = np.sqrt(np.where(cov_diag >= 0, cov_diag, np.nan))

    # unweighted rms residual in data units, at the last evaluated point (the
    # final Gauss-Newton step below xtol changes it only in second order)
    with np.errstate(invalid="ignore", divide="ignore"):
        r_plain = np.divide(r_sel, sw, out=np.zeros_like(r_sel), where=sw > 0)
    rms = np.sqrt(np.einsum("nm,nm->n", r_plain, r_plain) / np.maximum(n_used, 1))
    return dict(values=values_raw, sigma=sigma_out, reduced_chi2=red, rms=rms,
                iterations=it_sel, converged=conv_sel, n_used=n_used, reason=reason,
                cond_ok=cond_ok, candidates=candidates)
