"""Instrument systematics as nuisance parameters with Gaussian priors.

Every real instrument is off by a little: a reflectometer has stray light and a
dark level (an additive offset in R), a reference whose reflectance is known to
a fraction of a percent (a scale on R), and a spectrometer whose wavelength axis
is calibrated to a few tenths of a nanometre; an ellipsometer's angle of
incidence is known to about a tenth of a degree. Left out of the model, each of
these moves the fitted thickness by more than the noise would (an offset of
0.002 in R passes for a few nm of oxide on a 10 nm film) while the reported
uncertainty stays small.

filmmap fits them with the thicknesses, each with a Gaussian prior (a
regularised least-squares problem: each prior is one extra residual
``(value - mean) / prior_sigma``). Where the data pin a systematic down (a thick
film's fringes fix the wavelength scale), the data win; where they cannot (a
thin film cannot tell an offset from oxide), the prior holds it, and the
thickness uncertainty, taken from the full covariance with the priors,
grows to what the instrument's tolerance really allows.

The default prior widths are typical specifications of bench-top spectral
reflectometers and rotating-element ellipsometers (common practice, no
source): they are the user's to state in the lot file's ``[measurement]``.
"""

from __future__ import annotations

from dataclasses import dataclass

from filmmap.fitting.model import ELLIPSOMETRY, REFLECTANCE, FreeParameter

PRIOR_BOUND_SIGMAS = 8.0
"""A nuisance parameter is bounded at this many prior sigmas from its mean: far
beyond anything the prior allows, so the bound only keeps a wild start finite."""

SPECTROSCOPIC_MIN_WAVELENGTHS = 8
"""Below this many wavelengths an ellipsometer is taken to use laser lines, whose
wavelengths are known exactly, so no wavelength-shift parameter is added by default."""


@dataclass(frozen=True)
class Systematics:
    """How far the instrument may be off: one prior standard deviation each (0 = not fitted).

    Parameters
    ----------
    offset_sigma : float
        Additive reflectance offset (stray light, dark level), fraction of R.
    scale_sigma : float
        Relative reflectance scale error (reference reflectance, lamp drift), fraction
        (0.005 = 0.5 %).
    wavelength_shift_nm : float
        Wavelength-calibration shift of the spectrometer, nm.
    angle_offset_deg : float
        Angle-of-incidence offset, degrees.
    """

    offset_sigma: float = 0.0
    scale_sigma: float = 0.0
    wavelength_shift_nm: float = 0.0
    angle_offset_deg: float = 0.0

    @classmethod
    def defaults(cls, technique, n_wavelengths, angle_deg=0.0):
        """Documented default priors for a technique (common practice, no source).

        Parameters
        ----------
        technique : {"reflectance", "ellipsometry"}
        n_wavelengths : int
            Wavelengths per spectrum; below `SPECTROSCOPIC_MIN_WAVELENGTHS` an
            ellipsometer is taken to use laser lines (no wavelength shift).
        angle_deg : float
            Angle of incidence, degrees. A reflectometer at normal incidence gets
            no angle parameter (R changes only in second order with the angle).

        Returns
        -------
        Systematics
            Reflectance: offset 0.002, scale 0.5 %, wavelength shift 0.3 nm (and
            an angle offset of 0.1 deg at oblique incidence); ellipsometry: angle
            offset 0.1 deg, wavelength shift 0.3 nm when spectroscopic.
        """
        if technique == REFLECTANCE:
            return cls(offset_sigma=0.002, scale_sigma=0.005,
                       wavelength_shift_nm=0.3 if n_wavelengths > 1 else 0.0,
                       angle_offset_deg=0.1 if angle_deg > 0 else 0.0)
        if technique == ELLIPSOMETRY:
            spectro = n_wavelengths >= SPECTROSCOPIC_MIN_WAVELENGTHS
            return cls(angle_offset_deg=0.1, wavelength_shift_nm=0.3 if spectro else 0.0)
        raise ValueError(f"unknown technique {technique!r}")

    def parameters(self, technique):
        """The nuisance FreeParameters these priors ask for (zero widths are left out)."""
        out = []
        k = PRIOR_BOUND_SIGMAS
        if technique == REFLECTANCE:
            if self.scale_sigma > 0:
                out.append(FreeParameter("scale", None, 1.0 - k * self.scale_sigma,
                                         1.0 + k * self.scale_sigma, 1.0, "scale",
                                         prior_sigma=self.scale_sigma))
            if self.offset_sigma > 0:
                out.append(FreeParameter("offset", None, -k * self.offset_sigma,
                                         k * self.offset_sigma, 0.0, "offset",
                                         prior_sigma=self.offset_sigma))
        if self.wavelength_shift_nm > 0:
            out.append(FreeParameter("wavelength_shift", None, -k * self.wavelength_shift_nm,
                                     k * self.wavelength_shift_nm, 0.0, "wavelength_shift",
                                     prior_sigma=self.wavelength_shift_nm))
        if self.angle_offset_deg > 0:
            out.append(FreeParameter("angle_offset", None, -k * self.angle_offset_deg,
                                     k * self.angle_offset_deg, 0.0, "angle_offset",
                                     prior_sigma=self.angle_offset_deg))
        return out

    def any(self):
        """True when at least one systematic is fitted."""
        return any(v > 0 for v in (self.offset_sigma, self.scale_sigma,
                                   self.wavelength_shift_nm, self.angle_offset_deg))


NO_SYSTEMATICS = Systematics()
"""Nothing fitted but the physics: the model is taken as exact apart from the noise."""


LOT_TENSION_SIGMAS = 2.0
"""A lot whose median fitted systematic lies more than this many prior sigmas from the
prior mean gets a warning: one site can be off by chance, the median of a lot cannot."""


def lot_tension(free, values, ok):
    """Warnings for systematics that a whole lot pushes beyond their stated priors.

    Parameters
    ----------
    free : sequence of FreeParameter
        The fitted parameters (systematics carry ``prior_sigma``).
    values : numpy.ndarray (n, p)
        Fitted values per site.
    ok : numpy.ndarray (n,) of bool
        Accepted fits.

    Returns
    -------
    list of str
        One line per systematic whose lot median lies beyond `LOT_TENSION_SIGMAS` prior
        sigmas: the thicknesses of thin films lean on the priors, so a prior that is
        too tight for the instrument biases them.
    """
    import numpy as np

    out = []
    ok = np.asarray(ok, dtype=bool)
    if ok.sum() < 3:
        return out
    for i, f in enumerate(free):
        if not f.prior_sigma:
            continue
        med = float(np.median(np.asarray(values)[ok, i]))
        z = (med - f.start) / f.prior_sigma
        if abs(z) > LOT_TENSION_SIGMAS:
            out.append(f"the lot's median fitted {f.name} is {med:.4g}, {z:+.1f} prior sigmas from "
                       f"{f.start:g} (prior sigma {f.prior_sigma:g}): the instrument is off by more "
                       "than [measurement] states; recalibrate it or widen that prior, since thin "
                       "films lean on it")
    return out
