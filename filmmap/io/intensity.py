"""Raw-intensity mode: detector counts to absolute reflectance, with the dark and reference.

With ``reference_file`` (and optionally ``dark_file``) in ``[measurement]`` the data files
hold raw counts (``I@<nm>`` columns). Their reflectance is

    R = (I - I_dark) / (I_ref - I_dark) * R_Si,model

with I_ref the counts on a bare-silicon reference wafer and R_Si,model that wafer's
modelled reflectance at the measurement angle (the usual calibration of spectral
reflectometers; common practice, no source). Without a dark file the dark counts are
zero. The dark and reference are single-row ``I@<nm>`` files read by
`filmmap.io.spectra_csv.read_spectrum_file`.
"""

from __future__ import annotations

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.io.spectra_csv import read_spectrum_file

__all__ = ["intensity_to_reflectance", "read_dark_and_reference"]


def intensity_to_reflectance(counts, dark, reference, R_si_model):
    """Absolute reflectance from raw detector counts.

    R = (I - I_dark) / (I_ref - I_dark) * R_Si,model.

    Parameters
    ----------
    counts : numpy.ndarray, shape (n, m)
        Sample counts, detector counts.
    dark, reference : numpy.ndarray, shape (m,)
        Dark and bare-Si reference counts, detector counts.
    R_si_model : numpy.ndarray, shape (m,)
        Modelled reflectance of bare Si at the measurement angle (fraction).

    Returns
    -------
    numpy.ndarray, shape (n, m)
        Reflectance (fraction); NaN where the reference is not above the dark.

    References
    ----------
    .. [1] Reference-wafer calibration of spectral reflectometers: common practice, no
       source.
    """
    span = reference - dark
    with np.errstate(divide="ignore", invalid="ignore"):
        R = (counts - dark) / span * R_si_model
    return np.where(span > 0, R, np.nan)


def read_dark_and_reference(measurement):
    """Dark and bare-Si reference spectra of a raw-intensity lot (dark optional: zero counts).

    Parameters
    ----------
    measurement : filmmap.io.lotfile.MeasurementConfig
        The lot's ``[measurement]``.

    Returns
    -------
    dark_counts : numpy.ndarray or None
        Dark counts per wavelength (zeros without ``dark_file``); None when the lot is
        not in raw-intensity mode.
    reference : filmmap.io.spectra.Spectrum or None
        The reference spectrum.
    read : list of filmmap.io.spectra.Spectrum
        The spectra read, for the provenance (path and SHA-256).

    Raises
    ------
    FilmmapInputError
        A bad dark or reference file; wavelengths that differ between them; a reference
        not above the dark at every wavelength (naming the reference file and line).
    """
    m = measurement
    if not m.raw_intensity:
        return None, None, []
    ref = read_spectrum_file(m.reference_file)
    if m.dark_file is None:
        _check_reference_above_dark(ref, np.zeros_like(ref.counts), None)
        return np.zeros_like(ref.counts), ref, [ref]
    dark = read_spectrum_file(m.dark_file)
    if dark.wavelength_nm.size != ref.wavelength_nm.size or not np.allclose(
            dark.wavelength_nm, ref.wavelength_nm, rtol=1e-9, atol=0):
        raise FilmmapInputError(f"wavelengths differ from the dark spectrum {dark.path}",
                                file=ref.path)
    _check_reference_above_dark(ref, dark.counts, dark.path)
    return dark.counts, ref, [dark, ref]


def _check_reference_above_dark(ref, dark_counts, dark_path):
    """R = (I - dark)/(ref - dark) x R_Si needs ref > dark at every wavelength (else no data)."""
    span = ref.counts - dark_counts
    if np.all(span > 0):
        return
    k = int(np.argmax(~(span > 0)))
    what = f"the dark {dark_path}" if dark_path is not None else "zero (no dark_file)"
    raise FilmmapInputError(
        f"reference counts {ref.counts[k]:g} at {ref.wavelength_nm[k]:g} nm are not above "
        f"{what} ({dark_counts[k]:g}) at {int(np.sum(~(span > 0)))} of {span.size} wavelengths; "
        "expected a bare-Si reference brighter than the dark at every wavelength",
        file=ref.path, line=ref.line, field="reference_file")
