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
    kind : {"thickness", "cauchy_A", "cauchy_B", "scale", "offset"}
        Layer thickness (nm), Cauchy A (dimensionless) or B (um^2) of a
        Cauchy layer, or a reflectance calibration scale (dimensionless) or
        offset (fraction) applied as R_model * scale + offset.
    layer : int or None
        Index of the layer (top = 0) for layer parameters.
    lo, hi : float
        Search bounds (nm for thickness).
    start : float or None
        Starting/nominal value; thickness parameters without one are found by
        the global search.
    name : str
        Label in results, e.g. "thickness[SiO2]".
    """

    kind: str
    layer: int | None
    lo: float
    hi: float
    start: float | None = None
    name: str = ""

    @property
    def xtol(self):
        """Step size below which this parameter counts as converged (its own unit)."""
        return {"thickness": 1e-2, "cauchy_A": 1e-6, "cauchy_B": 1e-7}.get(self.kind, 1e-7)


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
        for p in self.free:
            if p.kind in ("cauchy_A", "cauchy_B") and not isinstance(stack.layers[p.layer].material, Cauchy):
                raise ValueError(f"{p.name}: Cauchy parameters need a Cauchy layer")
            if p.kind in ("scale", "offset") and technique != REFLECTANCE:
                raise ValueError("scale/offset parameters apply to reflectance only")

    @property
    def n_points(self):
        """Data points per spectrum (M)."""
        m = self.wavelength_nm.size
        return m if self.technique == REFLECTANCE else 2 * m

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
        for layer, coeffs in cauchy.items():
            mat = self.stack.layers[layer].material
            lam_um2 = (self.wavelength_nm * 1e-3) ** 2
            A = coeffs.get("cauchy_A", mat.A)
            B = coeffs.get("cauchy_B", mat.B_um2)
            # the same material with per-spectrum A, B: N(A, B) - N(A0, B0) = dA + dB / lambda^2
            N_layers[layer] = (self.N_layers[layer] + (A - mat.A) + (B - mat.B_um2) / lam_um2
                               + np.zeros((n, 1)))
        return thick, N_layers

    def _raw(self, P, derivatives):
        thick, N_layers = self._layer_inputs(P)
        if self.technique == REFLECTANCE:
            out = transfer.reflectance(self.wavelength_nm, self.N0, N_layers, thick, self.N_sub,
                                       self._angle, self.polarization, derivatives)
            return (out[0], out[1]) if derivatives else (out, None)
        out = transfer.psi_delta(self.wavelength_nm, self.N0, N_layers, thick, self.N_sub,
                                 self._angle, derivatives)
        if derivatives:
            psi, delta, dpsi, ddelta = out
            return np.concatenate([psi, delta], axis=-1), [
                np.concatenate([a, b], axis=-1) for a, b in zip(dpsi, ddelta)]
        return np.concatenate(out, axis=-1), None

    def evaluate(self, P, jacobian=False):
        """Predicted data for parameter vectors P (n, p); optionally the Jacobian (n, M, p).

        Thickness columns of the Jacobian are analytic; Cauchy columns use a
        forward difference (the index enters the recursion non-linearly and
        these parameters are rarely free).
        """
        P = np.atleast_2d(np.asarray(P, dtype=float))
        n = P.shape[0]
        f, dthick = self._raw(P, jacobian)
        f = np.broadcast_to(f, (n, self.n_points))
        scale = offset = None
        for i, p in enumerate(self.free):
            if p.kind == "scale":
                scale = P[:, i:i + 1]
            elif p.kind == "offset":
                offset = P[:, i:i + 1]
        base = f
        if scale is not None:
            f = f * scale
        if offset is not None:
            f = f + offset
        if not jacobian:
            return f
        J = np.empty((n, self.n_points, len(self.free)))
        for i, p in enumerate(self.free):
            if p.kind == "thickness":
                g = np.broadcast_to(dthick[p.layer], (n, self.n_points))
                J[:, :, i] = g if scale is None else g * scale
            elif p.kind in ("cauchy_A", "cauchy_B"):
                h = 1e-6 * max(1.0, abs(float(np.nanmean(P[:, i]))))
                Ph = P.copy()
                Ph[:, i] += h
                fh, _ = self._raw(Ph, False)
                d = (np.broadcast_to(fh, (n, self.n_points)) - base)
                if self.technique == ELLIPSOMETRY:
                    d = wrap_delta_difference(d, self.wavelength_nm.size)
                J[:, :, i] = (d / h) if scale is None else (d / h) * scale
            elif p.kind == "scale":
                J[:, :, i] = base
            elif p.kind == "offset":
                J[:, :, i] = 1.0
        return f, J


def wrap_delta_difference(diff, n_wavelengths):
    """Wrap the Delta half of a (..., 2m) Psi/Delta difference into [-180, 180) degrees."""
    diff = np.array(diff, dtype=float, copy=True)
    d = diff[..., n_wavelengths:]
    diff[..., n_wavelengths:] = np.mod(d + 180.0, 360.0) - 180.0
    return diff
