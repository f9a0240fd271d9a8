"""Fit film thicknesses to many spectra at once: global search, then local refinement.

The answer never depends on a starting value: every spectrum is scored
against a library of model spectra on a thickness grid covering the whole
search range (`filmmap.fitting.search`), each candidate basin (fringe order)
that could hold the best fit is refined by batched Levenberg-Marquardt
(`filmmap.fitting.lm`), and the refined candidates are compared. A result is
``ok`` only when one candidate is clearly best (or the nominal chooses among
equals), the fit converged inside the search bounds and fits the data.

Instrument systematics (reflectance offset and scale, wavelength shift, angle
offset; `filmmap.fitting.systematics`) are fitted with the thicknesses under
Gaussian priors, and the reported uncertainty is the total one, from the full
covariance of the regularised problem.
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
from filmmap.fitting.systematics import Systematics

POOR_FIT_CHI2 = 10.0
"""Default limit on the reduced chi-square: an rms residual above about 3 noise sigmas
marks the fit "wrong stack" (a flat or foreign spectrum fits no film that well)."""

MAX_GRID_POINTS = 20000
"""Largest global-search grid per thickness (about 0.3 mm of oxide at the default fineness)."""

MAX_LIBRARY_POINTS = 20000
"""Largest global-search grid over several free thicknesses together (the product of
the axes): coarser axes, then every candidate refined jointly (coarse to fine). Keeps
the library of two free layers at 20000 x M values (96 MB at 601 wavelengths); with
6000 points the 0-6000 nm default ranges of two layers missed the true basin of 9 in
64 spectra, with 20000 none (benchmarks/fit.py prints time and memory)."""

FEW_POINTS = 16
"""Spectra with at most this many data points (single- and few-wavelength
ellipsometry, a handful of reflectance wavelengths) are searched exhaustively: the
chi-square dips of so few points are narrow and nearly equal, so the local fit starts
from every local minimum of a grid four times finer and from every eighth of a period."""

STATISTICS_MIN_DOF = 20
"""Degrees of freedom from which the reduced chi-square is a usable measure of how
much the data scatter beyond the noise model (its relative spread, sqrt(2/dof), is then
below a third); only then is the covariance scaled up by it."""

REFINE_CHUNK_VALUES = 2**23
"""Candidate rows x data points x parameters refined at once (about 64 MiB per array)."""

SEARCH_CHUNK_VALUES = 2**22
"""Spectra x grid points scored at once in the global search (32 MiB of chi-square)."""

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
        Total standard uncertainty: sqrt(diag(C)), C = (J^T W J + P)^-1 the covariance
        of the regularised problem (P: the priors' 1/sigma^2 on the diagonal), so the
        instrument systematics are marginalised into it; scaled by the reduced
        chi-square when that exceeds 1 with at least `STATISTICS_MIN_DOF` degrees of
        freedom. NaN where not ok.
    sigma_stat : numpy.ndarray (n, p)
        Statistical part: the uncertainty from the noise alone, with the
        systematics held at their fitted values (NaN for the systematics themselves).
    correlation : numpy.ndarray (n, p, p)
        Correlation matrix of the fitted parameters (from C).
    reduced_chi2 : numpy.ndarray (n,)
        Goodness of fit: (sum(w r^2) + prior terms) / (points + priors - parameters),
        with w = 1/sigma^2 from the noise model; about 1 when the model explains the
        data to the noise.
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
    sigma_stat: np.ndarray | None = None
    correlation: np.ndarray | None = None
    free: list = field(default_factory=list)

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
                    offset=False, systematics=None, technique=REFLECTANCE, index_scale=()):
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
        Fit a reflectance calibration scale / offset without a prior (prefer
        ``systematics``, which fits them with priors).
    systematics : Systematics, optional
        Instrument systematics fitted under Gaussian priors
        (`filmmap.fitting.systematics`); None = none.
    technique : {"reflectance", "ellipsometry"}
        Which systematics apply.
    index_scale : sequence of int
        Layers whose index is multiplied by a fitted factor (started at 1, bounds
        0.8-1.2): n d is what a thick film's fringes measure, so the factor and the
        thickness are strongly correlated and the correlation is reported.
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
    for j in index_scale:
        out.append(FreeParameter("index_scale", j, 0.8, 1.2, 1.0,
                                 f"index_scale[{stack.layers[j].name}]"))
    if scale:
        out.append(FreeParameter("scale", None, 0.5, 1.5, 1.0, "scale"))
    if offset:
        out.append(FreeParameter("offset", None, -0.2, 0.2, 0.0, "offset"))
    if systematics is not None:
        taken = {f.kind for f in out}
        out.extend(f for f in systematics.parameters(technique) if f.kind not in taken)
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


def resolve_systematics(systematics, technique, m, angle_deg):
    """``"default"`` -> the technique's documented priors; None -> none; else as given."""
    if systematics is None:
        return None
    if isinstance(systematics, str):
        if systematics != "default":
            raise ValueError(f"systematics must be 'default', None or a Systematics, got {systematics!r}")
        angle = float(np.max(np.atleast_1d(angle_deg)))
        return Systematics.defaults(technique, m, angle)
    return systematics


def fringe_period_nm(model, layer):
    """Thickness period of the longest-wavelength fringe of a layer, lambda / (2 Re q), nm.

    The largest period of the data: two basins closer than half of it may be the same
    fringe order seen at another wavelength, so the nominal only chooses among
    candidates when exactly one lies within half of it.
    """
    sin0 = np.sin(np.deg2rad(model.angle_deg))
    q = np.sqrt(np.maximum(np.real(np.broadcast_to(model.N_layers[layer],
                                                   model.wavelength_nm.shape)) ** 2
                           - sin0**2, 1e-6))
    return float(np.max(model.wavelength_nm / (2.0 * q)))


def fit_spectra(stack, wavelength_nm, data, technique=REFLECTANCE, angle_deg=0.0, free=None,
                nominal=None, search_nm=None, sigma=None, mask=None, exclude_bands_nm=(),
                robust=False, poor_fit_chi2=POOR_FIT_CHI2, max_iter=40, max_candidates=32,
                polarization="u", grid_fineness=16.0, workers=None, block_rows=None,
                systematics="default"):
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
        Default: every layer thickness free (see `free_parameters`), plus the
        instrument systematics of ``systematics``.
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
        A reduced chi-square above this marks the fit "wrong stack".
    max_iter : int
        Levenberg-Marquardt iteration limit.
    max_candidates : int
        At most this many candidate basins refined per spectrum (spectra with at
        most `FEW_POINTS` points refine all of theirs).
    polarization : {"u", "s", "p"}
        Reflectance polarisation (unpolarised by default).
    grid_fineness : float
        Grid points per shortest in-film half-wave in the global search.
    workers : int, optional
        Threads sharing the work (default: up to 2, this project's core count).
    block_rows : int, optional
        Spectra per block (default: the batch split evenly over the workers, at most
        2048); bounds the memory of one block (about 0.1 GB at 2048 x 601 points).
    systematics : "default", Systematics or None
        Instrument systematics fitted under priors when ``free`` is None:
        ``"default"`` = `Systematics.defaults` for the technique; None = none
        (the model is taken as exact apart from the noise).

    Returns
    -------
    FitResult

    References
    ----------
    .. [1] D. W. Marquardt, J. SIAM 11, 431 (1963) (local refinement).
    .. [2] P. R. Bevington and D. K. Robinson, Data Reduction and Error Analysis
       for the Physical Sciences, 3rd ed. (2003), ch. 8 (covariance from the
       curvature matrix).
    .. [3] A. Tarantola, Inverse Problem Theory (SIAM, 2005), sect. 3.2 (least
       squares with Gaussian priors; the posterior covariance (G^T C_D^-1 G +
       C_M^-1)^-1, which marginalises the nuisance parameters).
    .. [4] P. J. Huber, Ann. Math. Stat. 35, 73 (1964) (robust weights).
    """
    wl = np.asarray(wavelength_nm, dtype=float)
    m = wl.size
    if free is None:
        free = free_parameters(stack, nominal=nominal, search_nm=search_nm,
                               systematics=resolve_systematics(systematics, technique, m, angle_deg),
                               technique=technique)
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
    prior_weight = np.array([1.0 / f.prior_sigma**2 if f.prior_sigma else 0.0 for f in free])
    prior_mean = np.array([f.start if f.prior_sigma else 0.0 for f in free], dtype=float)

    # --- global search: one library over the thickness parameters -----------
    few = model.n_points <= FEW_POINTS
    fineness = grid_fineness * (4.0 if few else 1.0)
    thick_axes = [i for i, f in enumerate(free) if f.kind == "thickness"]
    counts = {}
    for i in thick_axes:
        f = free[i]
        step = grid_step_nm(model, f.layer, fineness)
        counts[i] = max(2, int(np.ceil((f.hi - f.lo) / step)) + 1)
        if counts[i] > MAX_GRID_POINTS * (4 if few else 1):
            raise FilmmapInputError(
                f"search range {f.lo:g}-{f.hi:g} nm of {f.name} needs {counts[i]} grid points "
                f"(more than {MAX_GRID_POINTS}); expected a range a film can have",
                field="search_nm")
    if len(thick_axes) > 1:
        # several free thicknesses: a coarse joint grid (coarse to fine: every kept
        # candidate is then refined jointly by the local fit)
        total = float(np.prod([counts[i] for i in thick_axes]))
        if total > MAX_LIBRARY_POINTS:
            shrink = (MAX_LIBRARY_POINTS / total) ** (1.0 / len(thick_axes))
            counts = {i: max(3, int(c * shrink)) for i, c in counts.items()}
    grids = []
    for i, f in enumerate(free):
        if f.kind == "thickness":
            grids.append(np.linspace(f.lo, f.hi, counts[i]))
        else:
            grids.append(np.array([f.start]))
    points, library = build_library(model, grids)
    ctx = dict(model=model, m=m, p=p, free=free, grids=grids, shape=[g.size for g in grids],
               points=points, library=library, lo=lo, hi=hi, xtol=np.array([f.xtol for f in free]),
               max_iter=max_iter, max_candidates=max_candidates, robust=robust,
               col_use=np.tile(col_use, M // m), grid_weight=None, few=few,
               prior_mean=prior_mean, prior_weight=prior_weight, poor_fit_chi2=poor_fit_chi2)
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
        # at most 2048 spectra a block: the Jacobian of four parameters then stays near
        # the allocator's reuse threshold instead of being mapped afresh (and page-faulted)
        # on every evaluation
        block_rows = max(1, min(2048, -(-n // workers)))
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
    sigma_stat, corr = cat("sigma_stat"), cat("correlation")
    it_sel, conv_sel, n_used, reason = cat("iterations"), cat("converged"), cat("n_used"), cat("reason")
    cond_ok, signal = cat("cond_ok"), cat("signal")
    candidates = {}
    for sl, q in zip(blocks, parts):
        candidates.update({sl.start + k: v for k, v in q["candidates"].items()})

    # --- verdicts, in the order of their cause -------------------------------
    ok = np.ones(n, dtype=bool)

    def fail(cond, text):
        cond = cond & ok
        for k in np.nonzero(cond)[0]:
            reason[k] = text(k) if callable(text) else text
        ok[cond] = False

    n_physical = sum(1 for f in free if not f.prior_sigma)
    fail(n_used < max(1, n_physical),
         "no usable data: too few finite points in the spectrum")
    poor = red > poor_fit_chi2
    fail(poor & (signal != ""), lambda k: signal[k])
    searched_text = "; ".join(f"{f.name} {f.lo:g}-{f.hi:g} nm" for f in free
                              if f.kind == "thickness")
    fail(poor, lambda k: (f"wrong stack: poor fit at every thickness searched (reduced "
                          f"chi-square {red[k]:.3g} > {poor_fit_chi2:g}; searched "
                          f"{searched_text}); check the stack's materials and layers, a foreign "
                          "film on this site, or a thickness outside the searched range"))
    fail(np.array([r.startswith("ambiguous") for r in reason], dtype=bool), lambda k: reason[k])
    span = hi - lo
    searched = np.array([f.kind == "thickness" for f in free])
    at_lo = np.isclose(values_raw, lo, rtol=0, atol=1e-6 * span + 1e-9) & searched
    at_hi = np.isclose(values_raw, hi, rtol=0, atol=1e-6 * span + 1e-9) & searched
    # a thickness at 0 nm is at the physical bound, not a search bound: nothing to
    # widen, and a good fit there is an answer (no film within its uncertainty)
    at_zero = at_lo & (lo <= 0.0)
    at_lo &= ~at_zero
    for k in np.nonzero(np.any(at_zero, axis=1) & ok)[0]:
        reason[k] = "note: at the physical lower bound 0 nm (no film within its uncertainty)"
    fail(np.any(at_lo | at_hi, axis=1), lambda k: "at search bound: " + ", ".join(
        f"{free[i].name} = {values_raw[k, i]:.4g} at {'lower' if at_lo[k, i] else 'upper'} bound"
        for i in range(p) if at_lo[k, i] or at_hi[k, i]) + "; widen search_nm")
    fail(~conv_sel, lambda k: f"did not converge in {it_sel[k]} iterations")
    fail(~np.all(np.isfinite(sigma_out), axis=1) | ~cond_ok,
         "uncertainty undefined: parameters not determined by the data")

    values = np.where(ok[:, None], values_raw, np.nan)
    sigma_final = np.where(ok[:, None], sigma_out, np.nan)
    return FitResult(names=[f.name for f in free], values=values, unchecked_values=values_raw,
                     sigma=sigma_final, reduced_chi2=red, rms_residual=rms, iterations=it_sel,
                     ok=ok, reason=reason.astype(str), candidates=candidates,
                     sigma_stat=np.where(ok[:, None], sigma_stat, np.nan), correlation=corr,
                     free=list(free))


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


def _candidates(ctx, y_s, w_s):
    """Starting points of the local fit: the grid basins that can hold the best fit.

    Scores the block against the library in chunks of rows (memory bounded by
    `SEARCH_CHUNK_VALUES`), then keeps, per spectrum, every grid basin whose
    estimated minimum is near the best one or deep in the landscape; for spectra
    with few points, every local minimum and a start every eighth of a period.

    Returns
    -------
    rows : numpy.ndarray (k,) of int
        Spectrum of each start.
    starts : numpy.ndarray (k, p)
        Parameter vectors to refine.
    """
    grids, shape, points, library = ctx["grids"], ctx["shape"], ctx["points"], ctx["library"]
    free, max_candidates, few = ctx["free"], ctx["max_candidates"], ctx["few"]
    n = y_s.shape[0]
    G = library.shape[0]
    searched = [i for i, g in enumerate(grids) if g.size > 1]
    chunk = max(1, SEARCH_CHUNK_VALUES // max(G, 1))
    all_rows, all_starts = [], []
    for a in range(0, n, chunk):
        sl = slice(a, min(a + chunk, n))
        chi2_grid = score_library(y_s[sl], w_s if w_s.ndim == 1 else w_s[sl], library)
        k_rows = chi2_grid.shape[0]
        minima = local_minima(chi2_grid, shape)
        masked = np.where(minima, chi2_grid, np.inf)
        K = masked.shape[1] if few else min(max_candidates, masked.shape[1])
        top = np.argpartition(masked, K - 1, axis=1)[:, :K] if K < masked.shape[1] else \
            np.tile(np.arange(masked.shape[1]), (k_rows, 1))
        top_chi2 = np.take_along_axis(masked, top, axis=1)
        order = np.argsort(top_chi2, axis=1)
        top = np.take_along_axis(top, order, axis=1)
        top_chi2 = np.take_along_axis(top_chi2, order, axis=1)
        starts = points[top]  # (k, K, p)
        est = top_chi2.copy()
        if len(searched) == 1:
            i = searched[0]
            valid = np.isfinite(top_chi2)
            r_idx = np.nonzero(valid)[0]
            gx, gc = parabolic_vertex(grids[i], chi2_grid, r_idx, top[valid])
            starts[valid, i] = gx
            est[valid] = gc
        if few:
            keep = np.isfinite(est)
        else:
            best_est = est[:, :1]
            # a basin is worth refining when its estimated minimum is near the best one, or
            # deep compared with the whole chi-square landscape (periodic data: every basin is
            # a near-perfect fit, but the grid misses the narrow minima by varying amounts);
            # wrong fringe orders of broadband spectra sit at 25-40 % of the landscape's height
            depth = 0.02 * np.max(np.where(np.isfinite(chi2_grid), chi2_grid, 0.0), axis=1,
                                  keepdims=True)
            keep = np.isfinite(est) & ((est <= 3.0 * best_est + 100.0) | (est <= depth))
        keep[:, 0] = True
        r, c = np.nonzero(keep)
        all_rows.append(r + a)
        all_starts.append(starts[r, c])
        if few and len(searched) == 1:
            # and a start every eighth of a period: a dip narrower than the grid step
            # shows no grid minimum, but the local fit finds it from a start nearby
            i = searched[0]
            every = np.arange(0, grids[i].size, 4)
            rr = np.repeat(np.arange(k_rows), every.size)
            st = np.tile(points[every], (k_rows, 1))
            all_rows.append(rr + a)
            all_starts.append(st)
    rows = np.concatenate(all_rows)
    P0 = np.concatenate(all_starts)
    for i, f in enumerate(free):
        if f.kind != "thickness" and f.start is not None:
            P0[:, i] = f.start
    return rows, P0


def _no_signal(ctx, y, use):
    """Why a spectrum carries no film signal ("" where it does), for the poor fits.

    Reflectance: darker or brighter than anything the stack reflects at any
    searched thickness (beyond the noise and the systematics' priors), or flat.
    Ellipsometry: Psi and Delta both zero (nothing measured).
    """
    model = ctx["model"]
    n = y.shape[0]
    out = np.full(n, "", dtype=object)
    if not n:
        return out
    with np.errstate(invalid="ignore"):
        if model.technique == ELLIPSOMETRY:
            zero = np.all(np.where(use, np.abs(y) < 1e-6, True), axis=1) & use.any(axis=1)
            out[zero] = "no film signal: Psi and Delta are zero (no reflected light measured)"
            return out
        library = ctx["library"]
        lo_env, hi_env = library.min(axis=0), library.max(axis=0)
        free = ctx["free"]
        off = next((f.prior_sigma for f in free if f.kind == "offset" and f.prior_sigma), 0.0)
        scl = next((f.prior_sigma for f in free if f.kind == "scale" and f.prior_sigma), 0.0)
        a, b = DEFAULT_REFLECTANCE_SIGMA
        slack_lo = 5 * (a + b * lo_env) + 3 * off + 3 * scl * lo_env
        slack_hi = 5 * (a + b * hi_env) + 3 * off + 3 * scl * hi_env
        n_use = np.maximum(use.sum(axis=1), 1)
        below = np.sum(use & (y < lo_env - slack_lo), axis=1) / n_use
        above = np.sum(use & (y > hi_env + slack_hi), axis=1) / n_use
        yu = np.where(use, y, np.nan)
        med = np.nanmedian(yu, axis=1) if np.isfinite(yu).any() else np.full(n, np.nan)
        ptp = np.nanmax(yu, axis=1) - np.nanmin(yu, axis=1)
    for k in np.nonzero(below > 0.5)[0]:
        out[k] = (f"no film signal: the spectrum is darker than anything this stack reflects "
                  f"(median R {med[k]:.3g}, the stack gives at least {np.min(lo_env):.3g}): "
                  "dark, zero or no sample under the probe")
    for k in np.nonzero(above > 0.5)[0]:
        out[k] = (f"no film signal: the spectrum is brighter than anything this stack reflects "
                  f"(median R {med[k]:.3g}, the stack gives at most {np.max(hi_env):.3g}): "
                  "a mirror-like or metal surface, or a wrong reference")
    flat = (out == "") & (ptp <= 0.02 * np.abs(med)) & (use.sum(axis=1) >= 8)
    for k in np.nonzero(flat)[0]:
        out[k] = (f"no film signal: flat spectrum (peak-to-peak {ptp[k]:.2g} around "
                  f"R {med[k]:.3g}) that no film on this stack matches")
    return out


def _search_and_refine(ctx, y, s, mk):
    """Global search, candidate refinement, robust pass and uncertainties for one block."""
    model, m, p, free = ctx["model"], ctx["m"], ctx["p"], ctx["free"]
    lo, hi, xtol = ctx["lo"], ctx["hi"], ctx["xtol"]
    technique, max_iter = model.technique, ctx["max_iter"]
    prior_mean, prior_weight = ctx["prior_mean"], ctx["prior_weight"]
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
    rows, P0 = _candidates(ctx, y_s, w_s)

    # --- local refinement of every kept candidate, all in one batch ---------
    # one candidate per spectrum is the common case: then no copy of the data is needed
    single = rows.size == n and np.array_equal(rows, np.arange(n))
    if single:
        Pc, chi2c, JTJc, rc, itc, convc = levenberg_marquardt(
            model, P0, y_clean, sqrt_w, lo, hi, xtol, max_iter=max_iter,
            prior_mean=prior_mean, prior_weight=prior_weight)
    else:
        # several candidates per spectrum: refine them in chunks of rows, so memory
        # stays bounded by REFINE_CHUNK_VALUES whatever the number of candidates
        chunk = max(1, REFINE_CHUNK_VALUES // max(model.n_points * p, 1))
        outs = [levenberg_marquardt(model, P0[a:a + chunk], y_clean[rows[a:a + chunk]],
                                    sqrt_w[rows[a:a + chunk]], lo, hi, xtol, max_iter=max_iter,
                                    prior_mean=prior_mean, prior_weight=prior_weight)
                for a in range(0, rows.size, chunk)]
        Pc, chi2c, JTJc, rc, itc, convc = (np.concatenate(z) for z in zip(*outs))

    # --- choose per spectrum --------------------------------------------------
    n_prior = int(np.count_nonzero(prior_weight))
    dof = np.maximum(n_used + n_prior - p, 1)
    best_chi2 = np.full(n, np.inf)
    np.minimum.at(best_chi2, rows, chi2c)
    is_best = chi2c == best_chi2[rows]
    best_of = np.full(n, len(rows))
    np.minimum.at(best_of, rows[is_best], np.nonzero(is_best)[0])
    red_best = best_chi2 / dof
    inflate = np.where(dof >= STATISTICS_MIN_DOF, np.maximum(1.0, red_best), 1.0)
    band = COMPARABLE_DCHI2 * inflate
    comparable = chi2c <= best_chi2[rows] + band[rows]

    thick_idx = next((i for i, f in enumerate(free) if f.kind == "thickness"), 0)
    nominal_first = free[thick_idx].start if free[thick_idx].kind == "thickness" else None
    period = fringe_period_nm(model, free[thick_idx].layer) \
        if free[thick_idx].kind == "thickness" else np.inf
    values_raw = Pc[best_of]
    r_sel = rc if single else rc[best_of]
    chi2_sel = chi2c[best_of]
    JTJ_sel = JTJc[best_of]
    it_sel = itc[best_of]
    conv_sel = convc[best_of]
    reason = np.full(n, "", dtype=object)
    candidates = {}
    # spectra with several comparable candidates are few: handle them row by row
    cand_rows = np.bincount(rows[comparable], minlength=n)
    for s_i in np.nonzero(cand_rows > 1)[0]:
        sel = np.nonzero((rows == s_i) & comparable)[0]
        vals = Pc[sel, thick_idx]
        order_v = np.argsort(vals)
        sel, vals = sel[order_v], vals[order_v]
        # the same basin reached from several starts: keep its best refinement
        groups = np.concatenate([[0], np.cumsum(np.diff(vals) > 1.0)])
        keep_sel = []
        for g in np.unique(groups):
            members = sel[groups == g]
            keep_sel.append(members[np.argmin(chi2c[members])])
        sel = np.array(keep_sel)
        vals = Pc[sel, thick_idx]
        if sel.size <= 1:
            continue
        candidates[int(s_i)] = np.round(vals, 3)
        listed = ", ".join(f"{v:.1f}" for v in vals)
        if nominal_first is not None:
            near = np.abs(vals - nominal_first) <= 0.5 * period
            if np.count_nonzero(near) == 1:
                pick = sel[near][0]
                best_of[s_i] = pick
                values_raw[s_i], chi2_sel[s_i], JTJ_sel[s_i] = Pc[pick], chi2c[pick], JTJc[pick]
                r_sel[s_i] = rc[pick]
                it_sel[s_i], conv_sel[s_i] = itc[pick], convc[pick]
                reason[s_i] = (f"note: the nominal {nominal_first:g} nm chose {Pc[pick, thick_idx]:.2f} nm, "
                               f"the only one of {sel.size} equally good candidates ({listed} nm) "
                               f"within half a period ({0.5 * period:.0f} nm) of it")
                continue
            why = (f"{np.count_nonzero(near)} of them within half a period "
                   f"({0.5 * period:.0f} nm) of the nominal {nominal_first:g} nm")
        else:
            why = "no nominal to choose"
        reason[s_i] = (f"ambiguous: {sel.size} equally good candidates {listed} nm ({why}); "
                       "give a nominal, or measure more wavelengths or angles")

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
                model, values_raw, y_clean, sw, lo, hi, xtol, max_iter=max_iter,
                prior_mean=prior_mean, prior_weight=prior_weight)
            it_sel = it_sel + it2

    # --- uncertainty: the covariance of the regularised problem --------------
    red = chi2_sel / dof
    inflate = np.where(dof >= STATISTICS_MIN_DOF, np.maximum(1.0, red), 1.0)
    cov, cond_ok = _invert(JTJ_sel)
    cov *= inflate[:, None, None]
    diag = np.einsum("nii->ni", cov)
    with np.errstate(invalid="ignore", divide="ignore"):
        sigma_out = np.sqrt(np.where(diag >= 0, diag, np.nan))
        corr = cov / (sigma_out[:, :, None] * sigma_out[:, None, :])
    # statistical part: the data's curvature alone, the systematics held fixed
    phys = np.array([f.kind not in ("scale", "offset", "wavelength_shift", "angle_offset")
                     for f in free])
    data_jtj = JTJ_sel[:, phys][:, :, phys] - np.diag(prior_weight[phys])[None]
    cov_stat, _ = _invert(data_jtj)
    sigma_stat = np.full((n, p), np.nan)
    with np.errstate(invalid="ignore"):
        d_stat = np.einsum("nii->ni", cov_stat) * inflate[:, None]
        sigma_stat[:, phys] = np.sqrt(np.where(d_stat >= 0, d_stat, np.nan))

    # unweighted rms residual in data units, at the last evaluated point (the
    # final Gauss-Newton step below xtol changes it only in second order)
    with np.errstate(invalid="ignore", divide="ignore"):
        r_plain = np.divide(r_sel, sw, out=np.zeros_like(r_sel), where=sw > 0)
    rms = np.sqrt(np.einsum("nm,nm->n", r_plain, r_plain) / np.maximum(n_used, 1))
    signal = np.full(n, "", dtype=object)
    poor = np.nonzero(red > ctx["poor_fit_chi2"])[0]
    if poor.size:
        signal[poor] = _no_signal(ctx, y_clean[poor], use[poor])
    return dict(values=values_raw, sigma=sigma_out, reduced_chi2=red, rms=rms,
                iterations=it_sel, converged=conv_sel, n_used=n_used, reason=reason,
                cond_ok=cond_ok, candidates=candidates, sigma_stat=sigma_stat,
                correlation=corr, signal=signal)


def _invert(A):
    """Inverse of a stack of small symmetric matrices; (inverse, invertible flags)."""
    n = A.shape[0]
    inv = np.full_like(A, np.nan)
    good = np.zeros(n, dtype=bool)
    finite = np.all(np.isfinite(A), axis=(1, 2))
    k = np.nonzero(finite)[0]
    if k.size:
        try:
            inv[k] = np.linalg.inv(A[k])
            good[k] = True
        except np.linalg.LinAlgError:
            for kk in k:
                try:
                    inv[kk] = np.linalg.inv(A[kk])
                    good[kk] = True
                except np.linalg.LinAlgError:
                    pass
    return inv, good
