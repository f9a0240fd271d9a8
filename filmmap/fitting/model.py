"""The forward model of a fit: free parameters -> predicted spectra and Jacobian.

A `SpectralModel` binds a stack, the measured columns (wavelength and angle of
each) and the list of free parameters. It evaluates a whole batch of parameter
vectors at once, shape (n, p) -> predictions (n, M) and Jacobian (n, M, p),
where M is the number of data points per spectrum (m for reflectance, 2m for
Psi and Delta).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from filmmap.materials import Cauchy
from filmmap.optics import transfer

REFLECTANCE = "reflectance"
ELLIPSOMETRY = "ellipsometry"


@dataclass(frozen=True)
class FreeParameter:
    """One fitted quantity.

    Parameters
    ----------
    kind : {"thickness", "cauchy_A", "cauchy_B", "index_scale", "scale", "offset", \
            "wavelength_shift", "angle_offset"}
        Layer thickness (nm); Cauchy A (dimensionless) or B (um^2) of a Cauchy
        layer; a factor on a layer's complex index (dimensionless); or an
        instrument systematic: reflectance scale (dimensionless) and offset
        (fraction), applied as R_model * scale + offset; a wavelength-calibration
        shift (nm: the instrument's wavelength lambda measures lambda + shift);
        an angle-of-incidence offset (degrees).
    layer : int or None
        Index of the layer (top = 0) for layer parameters.
    lo, hi : float
        Search bounds (nm for thickness).
    start : float or None
        Starting/nominal value; thickness parameters without one are found by
        the global search.
    name : str
        Label in results, e.g. "thickness[SiO2]".
    prior_sigma : float or None
        Standard deviation of a Gaussian prior centred on ``start`` (same unit as
        the parameter); None = no prior (the data alone decide).
    """

    kind: str
    layer: int | None
    lo: float
    hi: float
    start: float | None = None
    name: str = ""
    prior_sigma: float | None = None

    @property
    def xtol(self):
        """Step size below which this parameter counts as converged (its own unit)."""
        if self.prior_sigma:
            # a hundredth of the prior: far below what moves the thickness
            return 0.01 * self.prior_sigma
        return {"thickness": 1e-2, "cauchy_A": 1e-6, "cauchy_B": 1e-7,
                "index_scale": 1e-6}.get(self.kind, 1e-7)

    @property
    def is_nuisance(self):
        """True for instrument systematics (not a property of the wafer)."""
        return self.kind in NUISANCE_KINDS


NUISANCE_KINDS = ("scale", "offset", "wavelength_shift", "angle_offset")
"""Parameter kinds that describe the instrument, not the film."""

LINEAR_PHASE_NM = {"reflectance": 0.3, "ellipsometry": 0.1}
"""Largest change of a layer's effective thickness (nm) over which the model is treated
as linear when a final Gauss-Newton step is taken without another evaluation. Delta near
the principal angle turns several degrees per nm of film, so ellipsometry gets a third of
the reflectance figure (found by the noise-free tmm tests: 0.3 nm left 0.016 nm errors
at 75 degrees, 0.1 nm leaves none above 0.01 nm)."""


class SpectralModel:
    """Batched forward model with analytic thickness derivatives.

    Parameters
    ----------
    stack : filmmap.optics.Stack
        Optical model; its layer thicknesses are used for fixed layers.
    wavelength_nm : array_like, shape (m,)
        Wavelength of each measured column, nm.
    angle_deg : float or array_like, shape (m,)
        Angle of incidence of each column, degrees.
    technique : {"reflectance", "ellipsometry"}
    free : sequence of FreeParameter
    polarization : {"u", "s", "p"}
        For reflectance; unpolarised by default.
    """

    def __init__(self, stack, wavelength_nm, angle_deg, technique, free, polarization="u"):
        self.stack = stack
        self.wavelength_nm = np.asarray(wavelength_nm, dtype=float)
        self.angle_deg = np.broadcast_to(np.asarray(angle_deg, dtype=float),
                                         self.wavelength_nm.shape).copy()
        if technique not in (REFLECTANCE, ELLIPSOMETRY):
            raise ValueError(f"technique must be '{REFLECTANCE}' or '{ELLIPSOMETRY}'")
        self.technique = technique
        self.free = tuple(free)
        self.polarization = polarization
        self.N0, self.N_layers, self.N_sub = stack.indices(self.wavelength_nm)
        self._angle = float(self.angle_deg[0]) if np.all(self.angle_deg == self.angle_deg[0]) \
            else self.angle_deg
        self._index = {}
        for i, p in enumerate(self.free):
            if p.kind in ("cauchy_A", "cauchy_B") and not isinstance(stack.layers[p.layer].material, Cauchy):
                raise ValueError(f"{p.name}: Cauchy parameters need a Cauchy layer")
            if p.kind in ("scale", "offset") and technique != REFLECTANCE:
                raise ValueError("scale/offset parameters apply to reflectance only")
            if p.kind in NUISANCE_KINDS:
                if p.kind in self._index:
                    raise ValueError(f"{p.kind} is given twice")
                self._index[p.kind] = i
        # wavelength shift: per layer, d ln(beta) / d lambda of the film phase
        # beta = 2 pi d q(lambda) / lambda, so that evaluating at lambda + shift is
        # evaluating at lambda with the thickness d (1 + shift * c)
        self.phase_dispersion = (self._phase_dispersion()
                                 if "wavelength_shift" in self._index else None)
        # Ellipsometry sees the substrate's index directly (Delta moves by degrees per
        # 0.01 of n near silicon's E1 edge at 365 nm), so there the shift is modelled in
        # full: every medium's index at lambda + shift to first order, dN/dlambda * shift,
        # and the film phase at the shifted wavelength. Reflectance keeps the film-phase
        # model, which needs no per-spectrum index arrays and so keeps the fast path.
        self.full_shift = technique == ELLIPSOMETRY and "wavelength_shift" in self._index
        self.index_slope = self._index_slope() if self.full_shift else None

    def _index_slope(self):
        """dN/dlambda (1/nm) of the ambient, each layer and the substrate, by central difference."""
        wl = self.wavelength_nm
        return (index_slope(self.stack.ambient, wl), [index_slope(layer.material, wl)
                                                       for layer in self.stack.layers],
                index_slope(self.stack.substrate, wl))

    def _phase_dispersion(self):
        """c_j(lambda) = Re(q_j'/q_j) - 1/lambda per layer (1/nm), q_j = N_j cos(theta_j).

        The interfaces' own change over a shift (the substrate's dispersion) is left
        out: over the few tenths of a nm a calibration is off by, it moves R by
        well under the noise, while the film phase moves by d * shift * c, which for
        a micrometre film is the whole effect.
        """
        wl = self.wavelength_nm
        sin0 = np.sin(np.deg2rad(self.angle_deg))
        out = []
        for layer, N in zip(self.stack.layers, self.N_layers):
            N = np.broadcast_to(np.asarray(N, dtype=complex), wl.shape)
            q = np.sqrt(N * N - (self.N0 * sin0) ** 2)
            # dq/dlambda = N dN/dlambda / q
            dq = N * index_slope(layer.material, wl) / q
            out.append(np.real(dq / q) - 1.0 / wl)
        return out

    @property
    def n_points(self):
        """Data points per spectrum (M)."""
        m = self.wavelength_nm.size
        return m if self.technique == REFLECTANCE else 2 * m

    def _nuisance(self, P, kind):
        """Column of a systematic, or None when it is not fitted or sits at its neutral value.

        The neutral values (offset 0, scale 1, no shift or angle offset) are where every
        fit starts; skipping them there saves whole passes over the data.
        """
        i = self._index.get(kind)
        if i is None:
            return None
        col = P[:, i:i + 1]
        neutral = 1.0 if kind == "scale" else 0.0
        return None if np.all(col == neutral) else col

    def _layer_inputs(self, P):
        """Thickness arrays and layer indices for a batch of parameter vectors."""
        n = P.shape[0]
        thick = [np.asarray(t, dtype=float) for t in self.stack.thicknesses]
        N_layers = list(self.N_layers)
        cauchy = {}
        for i, p in enumerate(self.free):
            if p.kind == "thickness":
                thick[p.layer] = P[:, i:i + 1]
            elif p.kind in ("cauchy_A", "cauchy_B"):
                cauchy.setdefault(p.layer, {})[p.kind] = P[:, i:i + 1]
            elif p.kind == "index_scale":
                N_layers[p.layer] = N_layers[p.layer] * P[:, i:i + 1]
        for layer, coeffs in cauchy.items():
            mat = self.stack.layers[layer].material
            lam_um2 = (self.wavelength_nm * 1e-3) ** 2
            A = coeffs.get("cauchy_A", mat.A)
            B = coeffs.get("cauchy_B", mat.B_um2)
            # the same material with per-spectrum A, B: N(A, B) - N(A0, B0) = dA + dB / lambda^2
            N_layers[layer] = (N_layers[layer] + (A - mat.A) + (B - mat.B_um2) / lam_um2
                               + np.zeros((n, 1)))
        shift = self._nuisance(P, "wavelength_shift")
        base_thick = thick
        stretch = None
        if shift is not None and self.full_shift:
            _, dN_layers, _ = self.index_slope
            N_layers = [N + shift * dN for N, dN in zip(N_layers, dN_layers)]
        elif shift is not None:
            # d_eff = d (1 + shift c): kept for the Jacobian's thickness rows
            stretch = []
            for c in self.phase_dispersion:
                st = shift * c
                st += 1.0
                stretch.append(st)
            thick = [t * st for t, st in zip(thick, stretch)]
        return thick, N_layers, (base_thick, stretch)

    def linear_step(self, P, step):
        """True for the rows where the model is linear over ``step`` to within the fit's tolerance.

        Offset and scale enter linearly. The thickness and the wavelength shift enter
        through the film phase, as a change of each layer's effective thickness
        d (1 + shift c); where that change stays below `LINEAR_PHASE_NM` at every
        wavelength, the model's curvature (about (4 pi n / lambda)^2 times the fringe
        amplitude) moves R by under 3e-5 and the next Gauss-Newton iterate by about
        2e-3 nm, far below the noise and the reported uncertainties. Other parameters
        (Cauchy, index scale, angle) must have converged to their own step tolerance.

        Parameters
        ----------
        P : numpy.ndarray (n, p)
            Current parameter vectors.
        step : numpy.ndarray (n, p)
            Proposed steps.

        Returns
        -------
        numpy.ndarray (n,) of bool
        """
        n = P.shape[0]
        ok = np.ones(n, dtype=bool)
        shift_i = self._index.get("wavelength_shift")
        for i, p in enumerate(self.free):
            if p.kind in ("cauchy_A", "cauchy_B", "index_scale", "angle_offset"):
                ok &= np.abs(step[:, i]) <= p.xtol
        for j in range(len(self.stack.layers)):
            i = next((k for k, p in enumerate(self.free)
                      if p.kind == "thickness" and p.layer == j), None)
            dd = np.abs(step[:, i]) if i is not None else np.zeros(n)
            if shift_i is not None:
                d_j = P[:, i] if i is not None else float(self.stack.thicknesses[j])
                c_max = float(np.max(np.abs(self.phase_dispersion[j])))
                dd = dd + np.abs(d_j * step[:, shift_i]) * c_max
            ok &= dd <= LINEAR_PHASE_NM[self.technique]
        return ok

    def _angle_of(self, P):
        da = self._nuisance(P, "angle_offset")
        return self._angle if da is None else self._angle + da

    def _raw(self, P, derivatives):
        thick, N_layers, base_thick = self._layer_inputs(P)
        angle = self._angle_of(P)
        wl, N0, N_sub = self.wavelength_nm, self.N0, self.N_sub
        shift = self._nuisance(P, "wavelength_shift") if self.full_shift else None
        if shift is not None:
            dN0, _, dN_sub = self.index_slope
            wl = wl + shift
            N0 = N0 + shift * dN0
            N_sub = N_sub + shift * dN_sub
        if self.technique == REFLECTANCE:
            out = transfer.reflectance(wl, N0, N_layers, thick, N_sub,
                                       angle, self.polarization, derivatives)
            return ((out[0], out[1]) if derivatives else (out, None)), base_thick
        out = transfer.psi_delta(wl, N0, N_layers, thick, N_sub, angle, derivatives)
        if derivatives:
            psi, delta, dpsi, ddelta = out
            return (np.concatenate([psi, delta], axis=-1), [
                np.concatenate([a, b], axis=-1) for a, b in zip(dpsi, ddelta)]), base_thick
        return (np.concatenate(out, axis=-1), None), base_thick

    def _difference_column(self, P, i, base, h):
        """Forward-difference column of the Jacobian for parameter i (no analytic form)."""
        n = P.shape[0]
        Ph = P.copy()
        Ph[:, i] += h
        (fh, _), _ = self._raw(Ph, False)
        d = np.broadcast_to(fh, (n, self.n_points)) - base
        if self.technique == ELLIPSOMETRY:
            d = wrap_delta_difference(d, self.wavelength_nm.size)
        return d / h

    def evaluate(self, P, jacobian=False, sqrt_w=None):
        """Predicted data for parameter vectors P (n, p); optionally the Jacobian (n, p, M).

        With ``sqrt_w`` (n, M) the Jacobian comes back weighted, sqrt(w) * df/dP: the
        weight is folded into each row as it is made, saving a pass per parameter.

        The Jacobian is laid out parameter-major, one contiguous row of M points per
        parameter, so that weighting it and forming J^T J run over contiguous memory.
        Thickness and wavelength-shift rows are analytic (the shift acts through the
        film phase, d f / d shift = sum_j d f / d d_j * d_j * c_j); Cauchy,
        index-scale and angle rows use a forward difference (they enter the
        recursion non-linearly and cost one extra evaluation each).
        """
        P = np.atleast_2d(np.asarray(P, dtype=float))
        n = P.shape[0]
        M = self.n_points
        (f, dthick), (base_thick, layer_stretch) = self._raw(P, jacobian)
        f = np.broadcast_to(f, (n, M))
        scale = self._nuisance(P, "scale")
        offset = self._nuisance(P, "offset")
        base = f
        if scale is not None:
            f = f * scale
        if offset is not None:
            f = f + offset
        if not jacobian:
            return f
        shift = self._nuisance(P, "wavelength_shift")
        dispersion = stretch = None
        if shift is not None and layer_stretch is not None:
            # per layer c_j and 1 + shift c_j on the M data points (Psi and Delta share a
            # wavelength)
            dispersion = [c if c.size == M else np.tile(c, M // c.size)
                          for c in self.phase_dispersion]
            stretch = [st if st.shape[-1] == M else np.tile(st, (1, M // st.shape[-1]))
                       for st in layer_stretch]
        # the scale (and the weight) multiply every model derivative: fold them in
        # once per layer
        dscaled = {}

        def layer_derivative(j):
            if j not in dscaled:
                g = np.broadcast_to(dthick[j], (n, M))
                if scale is not None:
                    g = g * scale
                    if sqrt_w is not None:
                        g *= sqrt_w
                elif sqrt_w is not None:
                    g = g * sqrt_w
                dscaled[j] = g
            return dscaled[j]

        J = np.empty((n, len(self.free), M))
        for i, p in enumerate(self.free):
            row = J[:, i, :]
            if p.kind == "thickness":
                # d f / d d = d f / d d_eff * (1 + shift * c)
                if stretch is not None:
                    np.multiply(layer_derivative(p.layer), stretch[p.layer], out=row)
                else:
                    np.copyto(row, layer_derivative(p.layer))
            elif p.kind == "wavelength_shift" and self.full_shift:
                row[...] = self._difference_column(P, i, base, 1e-3)
                if sqrt_w is not None:
                    row *= sqrt_w
            elif p.kind == "wavelength_shift":
                if dispersion is None:   # at zero shift: the same c_j, no stretch
                    dispersion = [c if c.size == M else np.tile(c, M // c.size)
                                  for c in self.phase_dispersion]
                first = True
                for j, c in enumerate(dispersion):
                    d_j = np.broadcast_to(np.asarray(base_thick[j], dtype=float), (n, 1))
                    if not np.any(d_j):
                        continue
                    if first:
                        np.multiply(d_j * c, layer_derivative(j), out=row)
                        first = False
                    else:
                        row += (d_j * c) * layer_derivative(j)
                if first:
                    row.fill(0.0)
            elif p.kind in ("cauchy_A", "cauchy_B", "index_scale", "angle_offset"):
                h = (1e-4 if p.kind == "angle_offset"
                     else 1e-6 * max(1.0, abs(float(np.nanmean(P[:, i])))))
                row[...] = self._difference_column(P, i, base, h)
                if scale is not None:
                    row *= scale
                if sqrt_w is not None:
                    row *= sqrt_w
            elif p.kind == "scale":
                if sqrt_w is not None:
                    np.multiply(base, sqrt_w, out=row)
                else:
                    np.copyto(row, base)
            elif p.kind == "offset":
                if sqrt_w is not None:
                    np.copyto(row, sqrt_w)
                else:
                    row.fill(1.0)
        return f, J


def index_slope(material, wavelength_nm, h=0.05):
    """dN/dlambda of a material (1/nm), by central difference kept inside its valid range.

    Parameters
    ----------
    material : filmmap.materials.Material
    wavelength_nm : numpy.ndarray
        Wavelengths, nm.
    h : float
        Half step, nm; at the ends of the range the step is one-sided.

    Returns
    -------
    numpy.ndarray of complex
    """
    wl = np.asarray(wavelength_nm, dtype=float)
    lo_r, hi_r = getattr(material, "range_nm", (-np.inf, np.inf))
    if getattr(material, "extrapolate", False):
        lo_r, hi_r = -np.inf, np.inf
    hi = np.minimum(wl + h, hi_r)
    lo = np.maximum(wl - h, lo_r)
    span = np.where(hi > lo, hi - lo, 1.0)
    N_hi = np.broadcast_to(np.asarray(material(hi), dtype=complex), wl.shape)
    N_lo = np.broadcast_to(np.asarray(material(lo), dtype=complex), wl.shape)
    return np.where(hi > lo, (N_hi - N_lo) / span, 0.0)


def wrap_delta_difference(diff, n_wavelengths):
    """Wrap the Delta half of a (..., 2m) Psi/Delta difference into [-180, 180) degrees."""
    diff = np.array(diff, dtype=float, copy=True)
    d = diff[..., n_wavelengths:]
    diff[..., n_wavelengths:] = np.mod(d + 180.0, 360.0) - 180.0
    return diff
