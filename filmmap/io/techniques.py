"""Techniques: what a spectra file measures, apart from how its columns are laid out.

A *technique* is physics: which quantities a spectrum holds, in which units, and which
values are possible. A *layout* (`filmmap.io.layouts`) is only the arrangement of those
quantities in a file (a row per site, a row per wavelength, a file per site, ...). Every
layout asks this module which quantities to read and checks its values here, so a new
layout never repeats the physics and a technique reads alike in every layout.

==============  ===========================  ==============================================
technique       quantities                   values
==============  ===========================  ==============================================
reflectance     ``R``                        reflectance, fraction 0-1 (or percent in file)
ellipsometry    ``psi``, ``delta``           ellipsometric angles, degrees
intensity       ``I``                        raw detector counts (raw-intensity mode; turned
                                             into reflectance by `filmmap.io.intensity`)
==============  ===========================  ==============================================

Common mistakes are named (after common practice, no source): reflectance in percent read
as a fraction and the reverse, ellipsometric angles in radians, delta outside both
conventions.
"""

from __future__ import annotations

import numpy as np

from filmmap.errors import FilmmapInputError

__all__ = ["TECHNIQUES", "REFLECTANCE_UNITS", "QUANTITIES", "TECHNIQUE_OF_QUANTITY",
           "MAX_FRACTION", "PSI_RANGE_DEG", "DELTA_RANGE_DEG", "check_arguments",
           "check_percent_is_percent", "check_values"]

#: Quantities (file column prefixes) of each technique, in the order they are read.
QUANTITIES = {"reflectance": ("R",), "ellipsometry": ("psi", "delta"), "intensity": ("I",)}

#: Techniques a spectra file can be read as.
TECHNIQUES = tuple(QUANTITIES)

#: The technique each quantity belongs to.
TECHNIQUE_OF_QUANTITY = {q: t for t, qs in QUANTITIES.items() for q in qs}

#: Accepted values of ``reflectance_unit``.
REFLECTANCE_UNITS = ("fraction", "percent")

#: Largest plausible reflectance given as a fraction: above it the file is almost surely
#: in percent. Measured values slightly above 1 (noise, calibration) are accepted.
MAX_FRACTION = 1.5

#: Accepted psi, degrees.
PSI_RANGE_DEG = (0.0, 90.0)

#: Accepted delta, degrees: both the (-180, 180] and the [0, 360) conventions.
DELTA_RANGE_DEG = (-180.0, 360.0)


def check_arguments(technique, reflectance_unit):
    """Refuse a technique or unit filmmap does not know (a programming error: ValueError)."""
    if technique not in TECHNIQUES:
        raise ValueError(f"technique must be one of {TECHNIQUES}, got {technique!r}")
    if reflectance_unit not in REFLECTANCE_UNITS:
        raise ValueError(f"reflectance_unit must be one of {REFLECTANCE_UNITS}, "
                         f"got {reflectance_unit!r}")


def check_percent_is_percent(R, path, line, field=None):
    """Refuse reflectance said to be in percent whose values are all <= `MAX_FRACTION`: the
    file holds fractions 0-1 (common practice, no source).

    Parameters
    ----------
    R : numpy.ndarray
        Reflectance as in the file, percent.
    path : pathlib.Path
        The file, for messages.
    line : int
        Line to name (the first data row).
    field : str, optional
        Field to name.
    """
    if R.max() <= MAX_FRACTION:
        raise FilmmapInputError(
            f"all reflectance values are <= {MAX_FRACTION:g} although the lot says "
            'reflectance_unit = "percent"; the file looks like fractions 0-1 - set '
            'reflectance_unit = "fraction"', file=path, line=line, field=field)


def check_values(technique, unit, data, path, lines, wl_lines=None):
    """The physical checks of a technique's values, for any layout; returns the data in
    filmmap's units (reflectance as a fraction).

    Reflectance: >= 0; as a fraction at most `MAX_FRACTION` (above it the file is in
    percent), in percent not all below it (then the file holds fractions). Ellipsometry:
    psi and delta not all within pi/2 and 2 pi (radians), psi in `PSI_RANGE_DEG`, delta in
    `DELTA_RANGE_DEG` (either convention).

    Parameters
    ----------
    technique : str
        A key of `QUANTITIES`.
    unit : {"fraction", "percent"}
        Unit of the reflectance values in the file.
    data : dict of str to numpy.ndarray
        ``{"R": ...}`` or ``{"psi": deg, "delta": deg}``, each shape (rows, wavelengths).
    path : pathlib.Path
        The file, for messages.
    lines : numpy.ndarray of int
        Line of each row (site).
    wl_lines : numpy.ndarray of int, optional
        Line of each wavelength, for layouts with a wavelength per line (then an
        offending value is located by its wavelength).

    Returns
    -------
    dict of str to numpy.ndarray
    """
    def where(mask):
        r = np.argwhere(mask)[0]
        if wl_lines is not None:
            return int(wl_lines[r[1]])
        return int(lines[min(r[0], lines.size - 1)])

    if technique in ("reflectance", "intensity") and "R" in data:
        R = data["R"]
        if np.any(R < 0):
            raise FilmmapInputError(f"negative reflectance {R[R < 0][0]:g}; expected >= 0",
                                    file=path, line=where(R < 0), field="R")
        if unit == "fraction" and np.any(R > MAX_FRACTION):
            raise FilmmapInputError(
                f"reflectance {R.max():g} is above {MAX_FRACTION:g}, too large for a fraction "
                'and looks like percent; if so, set reflectance_unit = "percent" in the lot file',
                file=path, line=where(R > MAX_FRACTION), field="R")
        if unit == "percent":
            check_percent_is_percent(R, path, int(lines[0]), field="R")
            return {"R": R / 100.0}
        return data
    psi, delta = data["psi"], data["delta"]
    if psi.size and np.max(np.abs(psi)) <= np.pi / 2 and np.max(np.abs(delta)) <= 2 * np.pi:
        raise FilmmapInputError(
            f"psi within {np.max(np.abs(psi)):.3g} and delta within {np.max(np.abs(delta)):.3g} "
            "look like radians; expected degrees", file=path, line=int(lines[0]), field="psi")
    bad = (psi < PSI_RANGE_DEG[0]) | (psi > PSI_RANGE_DEG[1])
    if bad.any():
        raise FilmmapInputError(f"psi {psi[bad][0]:g} deg is outside [0, 90] deg", file=path,
                                line=where(bad), field="psi")
    bad = (delta < DELTA_RANGE_DEG[0]) | (delta > DELTA_RANGE_DEG[1])
    if bad.any():
        raise FilmmapInputError(
            f"delta {delta[bad][0]:g} deg is outside both conventions, (-180, 180] and "
            "[0, 360) deg; expected degrees in one of them", file=path, line=where(bad),
            field="delta")
    return data
