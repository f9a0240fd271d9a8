"""Provenance of a report: input files with SHA-256, software, stack, models and their sources."""

from __future__ import annotations

import datetime as _dt
import json

from filmmap import __version__
from filmmap.lotstats.view import read_input_hashes

#: Models behind every reduced lot, with their published sources.
MODEL_SOURCES = (
    ("Reflectance and ellipsometric ratio of the film stack: Fresnel coefficients with "
     "Airy multiple-beam summation, in transfer-matrix form",
     "M. Born and E. Wolf, Principles of Optics, 7th ed., Cambridge University Press (1999); "
     "R. M. A. Azzam and N. M. Bashara, Ellipsometry and Polarized Light, North-Holland (1977)"),
    ("SiO2 refractive index: Sellmeier dispersion",
     "I. H. Malitson, J. Opt. Soc. Am. 55, 1205-1209 (1965)"),
    ("Si complex index n, k: tabulated, shape-preserving interpolation",
     "M. A. Green, Sol. Energy Mater. Sol. Cells 92, 1305-1310 (2008)"),
    ("Thickness refinement: Levenberg-Marquardt least squares",
     "D. W. Marquardt, J. Soc. Ind. Appl. Math. 11, 431-441 (1963)"),
    ("Fit uncertainty: curvature of chi-square scaled by the reduced chi-square",
     "P. R. Bevington and D. K. Robinson, Data Reduction and Error Analysis for the "
     "Physical Sciences, 3rd ed., McGraw-Hill (2003)"),
    ("Wafer shape: Zernike polynomials in Noll's ordering",
     "R. J. Noll, J. Opt. Soc. Am. 66, 207-211 (1976)"),
    ("Robust sigma of the slot profile: 1.4826 x median absolute deviation",
     "F. R. Hampel, J. Am. Stat. Assoc. 69, 383-393 (1974)"),
)

#: Models behind the advice (shown only when advice is present).
ADVICE_MODEL_SOURCES = (
    ("Oxide growth for the advised oxidation time: linear-parabolic (Deal-Grove) model",
     "B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965)"),
)


def provenance(ds, advice=None):
    """What the report rests on, as plain data for the HTML and PDF writers.

    Parameters
    ----------
    ds : xarray.Dataset
        The lot dataset (attributes ``input_files_sha256``, ``software``,
        ``stack``, ``created``, ``technique``, ``angle_deg``,
        ``wavelength_range_nm``, ``fitted_parameters``).
    advice : dict, optional
        When given, the growth-model source is listed too.

    Returns
    -------
    dict
        ``inputs`` (list of {file, sha256}), ``inputs_problem`` (str or None),
        ``software``, ``report_software``, ``stack``, ``created``,
        ``report_created``, ``technique``, ``angle_deg``, ``wavelength_range_nm``,
        ``fitted_parameters`` (all str), ``models`` (list of (model, source)).
    """
    a = ds.attrs
    inputs, problem = read_input_hashes(ds)
    wl = a.get("wavelength_range_nm", "")
    try:
        lo, hi = json.loads(wl) if isinstance(wl, str) and wl else (None, None)
        wl_text = f"{float(lo):g}-{float(hi):g} nm" if lo is not None else ""
    except (ValueError, TypeError):
        wl_text = str(wl)
    fitted = a.get("fitted_parameters", "")
    try:
        fitted_text = ", ".join(json.loads(fitted)) if isinstance(fitted, str) and fitted else ""
    except (ValueError, TypeError):
        fitted_text = str(fitted)
    models = list(MODEL_SOURCES) + (list(ADVICE_MODEL_SOURCES) if advice else [])
    return {
        "inputs": inputs,
        "inputs_problem": problem,
        "software": str(a.get("software", "")) or "not recorded in the dataset",
        "report_software": f"filmmap {__version__}",
        "stack": str(a.get("stack", "")) or "not recorded in the dataset",
        "created": str(a.get("created", "")),
        "report_created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "technique": str(a.get("technique", "")),
        "angle_deg": "" if a.get("angle_deg") is None else f"{float(a['angle_deg']):g}",
        "wavelength_range_nm": wl_text,
        "fitted_parameters": fitted_text,
        "models": models,
    }


def provenance_rows(prov):
    """The provenance table as ``(label, text)`` rows, shared by report.html and report.pdf.

    Parameters
    ----------
    prov : dict
        As `provenance` returns it.

    Returns
    -------
    list of (str, str)
    """
    return [("software (reduction)", prov["software"]),
            ("software (report)", prov["report_software"]),
            ("results created", prov["created"] or "not recorded"),
            ("report created", prov["report_created"]),
            ("technique", prov["technique"] + (f", angle {prov['angle_deg']} deg"
                                               if prov["angle_deg"] else "")),
            ("wavelength range", prov["wavelength_range_nm"] or "not recorded"),
            ("fitted parameters", prov["fitted_parameters"] or "not recorded")]
