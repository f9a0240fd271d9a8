"""Measurement-site patterns on a wafer: a centre site plus rings of equally spaced sites.

Coordinates (pinned for the whole of `filmmap.wafermap`): x and y in mm with
the origin at the wafer centre, the notch toward -y (at 270 deg), angles in
degrees measured from +x, counter-clockwise (so +y is 90 deg).

Layouts
-------
Ring radii are fractions of the measured radius ``R_m = D/2 - edge_exclusion``;
the outermost ring always sits on the edge-exclusion radius. Each ring's sites
are equally spaced; the "start" column is the angle of the first site of that
ring. Sites are numbered from 1: site 1 is the centre, then ring by ring
outward, counter-clockwise within a ring from its start angle.

=====  ======================================  =====================
sites  rings (fraction of R_m: count @ start)  notes
=====  ======================================  =====================
1      centre only                             no ring
5      1: 4 @ 0                                centre + one cross
9      1/2: 4 @ 45; 1: 4 @ 0                   inner cross turned 45
13     1/2: 4 @ 45; 1: 8 @ 0
17     1/2: 8 @ 22.5; 1: 8 @ 0                 inner ring staggered
25     1/2: 8 @ 0; 1: 16 @ 0                   8 k sites on ring k
49     1/3: 8; 2/3: 16; 1: 24 (all @ 0)        8 k sites on ring k
121    1/5 ... 1: 8, 16, 24, 32, 40 (all @ 0)  8 k sites on ring k
=====  ======================================  =====================

Every layout is symmetric under x -> -x and y -> -y (hence also under
inversion through the centre), so an even pattern cannot masquerade as a
tilt. These layouts are filmmap's own choice after common practice (centre
plus rings, ring radii equally spaced, outer ring at the edge exclusion);
there is no published standard behind them.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from filmmap.errors import FilmmapInputError

#: Ring layouts: n_sites -> tuple of (radius fraction of R_m, count, start angle in deg).
LAYOUTS = {
    1: (),
    5: ((1.0, 4, 0.0),),
    9: ((0.5, 4, 45.0), (1.0, 4, 0.0)),
    13: ((0.5, 4, 45.0), (1.0, 8, 0.0)),
    17: ((0.5, 8, 22.5), (1.0, 8, 0.0)),
    25: ((0.5, 8, 0.0), (1.0, 16, 0.0)),
    49: ((1 / 3, 8, 0.0), (2 / 3, 16, 0.0), (1.0, 24, 0.0)),
    121: ((0.2, 8, 0.0), (0.4, 16, 0.0), (0.6, 24, 0.0), (0.8, 32, 0.0), (1.0, 40, 0.0)),
}

#: Site counts with a built-in layout.
SITE_COUNTS = tuple(sorted(LAYOUTS))

#: Slack (mm) when testing "inside the edge exclusion": a site on the
#: edge-exclusion circle counts as inside despite float rounding (1 nm of position).
EDGE_TOL_MM = 1e-6


class Sites(NamedTuple):
    """A site pattern: 1-based site numbers and their coordinates.

    Attributes
    ----------
    site : numpy.ndarray of int, shape (n_sites,)
        Site numbers, 1-based.
    x_mm, y_mm : numpy.ndarray of float, shape (n_sites,)
        Site coordinates in mm, wafer-centre origin, notch toward -y.
    """

    site: np.ndarray
    x_mm: np.ndarray
    y_mm: np.ndarray


def check_wafer(diameter_mm, edge_exclusion_mm):
    """Validate a wafer diameter and edge exclusion; return them as floats.

    Parameters
    ----------
    diameter_mm : float
        Wafer diameter in mm; finite and > 0.
    edge_exclusion_mm : float
        Edge exclusion in mm (width of the excluded annulus at the rim);
        finite, >= 0 and smaller than the wafer radius.

    Returns
    -------
    (float, float)
        ``(diameter_mm, edge_exclusion_mm)``.

    Raises
    ------
    FilmmapInputError
        On a non-numeric, non-finite or out-of-range value.

    References
    ----------
    .. [1] Common practice, no source: the quality area of a wafer is the disk
       of radius D/2 - edge exclusion.
    """
    try:
        d = float(diameter_mm)
    except (TypeError, ValueError):
        raise FilmmapInputError(f"wafer diameter must be a number in mm, got {diameter_mm!r}",
                                field="diameter_mm") from None
    try:
        ee = float(edge_exclusion_mm)
    except (TypeError, ValueError):
        raise FilmmapInputError(f"edge exclusion must be a number in mm, got {edge_exclusion_mm!r}",
                                field="edge_exclusion_mm") from None
    if not np.isfinite(d) or d <= 0:
        raise FilmmapInputError(f"wafer diameter must be finite and > 0 mm, got {d:g}",
                                field="diameter_mm")
    if not np.isfinite(ee) or ee < 0 or ee >= d / 2:
        raise FilmmapInputError(
            f"edge exclusion must be >= 0 mm and smaller than the wafer radius {d / 2:g} mm, "
            f"got {ee:g}", field="edge_exclusion_mm")
    return d, ee


def ring_sites(radii_mm, counts, start_deg=None, centre=True):
    """Sites on concentric rings of equally spaced points (plus an optional centre).

    Parameters
    ----------
    radii_mm : sequence of float
        Ring radii in mm, each > 0.
    counts : sequence of int
        Number of sites on each ring (>= 1), same length as ``radii_mm``.
    start_deg : sequence of float, optional
        Angle in degrees (from +x, counter-clockwise) of the first site of each
        ring; default 0 for every ring.
    centre : bool
        Put site 1 at the wafer centre.

    Returns
    -------
    Sites
        Numbered from 1 (centre first if present), ring by ring in the given
        order, counter-clockwise within a ring.

    References
    ----------
    .. [1] Common practice, no source: polar site maps (centre plus rings).
    """
    radii = np.atleast_1d(np.asarray(radii_mm, dtype=float))
    counts = np.atleast_1d(np.asarray(counts))
    if radii.ndim != 1 or counts.shape != radii.shape:
        raise FilmmapInputError("radii_mm and counts must be 1-D sequences of the same length",
                                field="counts")
    if radii.size and (not np.all(np.isfinite(radii)) or np.any(radii <= 0)):
        raise FilmmapInputError("ring radii must be finite and > 0 mm", field="radii_mm")
    if counts.size and (not np.issubdtype(counts.dtype, np.integer) or np.any(counts < 1)):
        raise FilmmapInputError("ring site counts must be integers >= 1", field="counts")
    if start_deg is None:
        starts = np.zeros(radii.shape)
    else:
        starts = np.atleast_1d(np.asarray(start_deg, dtype=float))
        if starts.shape != radii.shape or not np.all(np.isfinite(starts)):
            raise FilmmapInputError("start_deg must give one finite angle per ring",
                                    field="start_deg")
    xs, ys = ([0.0], [0.0]) if centre else ([], [])
    for r, k, a0 in zip(radii, counts, starts):
        ang = np.deg2rad(a0 + 360.0 * np.arange(int(k)) / int(k))
        xs.extend(r * np.cos(ang))
        ys.extend(r * np.sin(ang))
    x = np.asarray(xs, dtype=float)
    y = np.asarray(ys, dtype=float)
    # cos(90 deg) is 6e-17, not 0: snap sub-nanometre residue to exact zero
    scale = max(1.0, float(radii.max()) if radii.size else 1.0)
    x[np.abs(x) < 1e-12 * scale] = 0.0
    y[np.abs(y) < 1e-12 * scale] = 0.0
    return Sites(np.arange(1, x.size + 1), x, y)


def polar_sites(n_sites, diameter_mm, edge_exclusion_mm):
    """One of the built-in polar site patterns (see the module docstring).

    Parameters
    ----------
    n_sites : int
        One of `SITE_COUNTS`: 1, 5, 9, 13, 17, 25, 49, 121.
    diameter_mm : float
        Wafer diameter in mm.
    edge_exclusion_mm : float
        Edge exclusion in mm; the outer ring lies on radius D/2 - edge exclusion.

    Returns
    -------
    Sites
        ``site`` (1-based, shape (n_sites,)), ``x_mm``, ``y_mm`` (mm, shape (n_sites,)).

    Raises
    ------
    FilmmapInputError
        Unknown site count or invalid wafer geometry.

    References
    ----------
    .. [1] Common practice, no source: centre plus rings of equally spaced
       sites, outer ring at the edge-exclusion radius; layouts are filmmap's own.
    """
    d, ee = check_wafer(diameter_mm, edge_exclusion_mm)
    try:
        layout = LAYOUTS[int(n_sites)] if float(n_sites) == int(n_sites) else None
    except (TypeError, ValueError, KeyError):
        layout = None
    if layout is None:
        raise FilmmapInputError(
            f"no built-in site pattern with {n_sites!r} sites; choose one of "
            + ", ".join(str(k) for k in SITE_COUNTS), field="n_sites")
    r_m = d / 2 - ee
    return ring_sites([f * r_m for f, _, _ in layout], [k for _, k, _ in layout],
                      [a for _, _, a in layout], centre=True)


def inside_edge_exclusion(x_mm, y_mm, diameter_mm, edge_exclusion_mm):
    """Which sites lie inside the quality area (radius <= D/2 - edge exclusion).

    Parameters
    ----------
    x_mm, y_mm : array_like
        Site coordinates in mm (wafer-centre origin).
    diameter_mm, edge_exclusion_mm : float
        Wafer diameter and edge exclusion in mm.

    Returns
    -------
    numpy.ndarray of bool
        True where ``hypot(x, y) <= D/2 - edge_exclusion + EDGE_TOL_MM``; a
        site exactly on the edge-exclusion circle counts as inside.

    References
    ----------
    .. [1] Common practice, no source.
    """
    d, ee = check_wafer(diameter_mm, edge_exclusion_mm)
    r = np.hypot(np.asarray(x_mm, dtype=float), np.asarray(y_mm, dtype=float))
    return r <= d / 2 - ee + EDGE_TOL_MM


def lot_arrays(thickness_nm, ok, x_mm, y_mm):
    """Normalise the per-site inputs every wafer-map function takes.

    Parameters
    ----------
    thickness_nm : array_like, shape (n_wafers, n_sites) or (n_sites,)
        Thickness in nm; NaN (or any non-finite value) for a missing site.
    ok : array_like of bool or None
        Fit-quality flag per site, broadcastable to ``thickness_nm``
        (e.g. shape (n_sites,) for the same flag on every wafer); None = all ok.
    x_mm, y_mm : array_like, shape (n_sites,)
        Site coordinates in mm.

    Returns
    -------
    t : numpy.ndarray, shape (n_wafers, n_sites)
        Thickness in nm (a 1-D input becomes one wafer).
    good : numpy.ndarray of bool, shape (n_wafers, n_sites)
        ``ok`` and finite thickness.
    x, y : numpy.ndarray, shape (n_sites,)
    single : bool
        True when ``thickness_nm`` was 1-D (callers return per-wafer scalars).

    References
    ----------
    .. [1] Common practice, no source.
    """
    t = np.asarray(thickness_nm, dtype=float)
    if t.ndim not in (1, 2):
        raise FilmmapInputError(
            f"thickness must have shape (n_wafers, n_sites) or (n_sites,), got {t.shape}",
            field="thickness_nm")
    single = t.ndim == 1
    t = np.atleast_2d(t)
    x = np.asarray(x_mm, dtype=float)
    y = np.asarray(y_mm, dtype=float)
    if x.ndim != 1 or x.shape != y.shape or x.size != t.shape[1]:
        raise FilmmapInputError(
            f"x_mm and y_mm must be 1-D with one entry per site ({t.shape[1]}), "
            f"got shapes {x.shape} and {y.shape}", field="x_mm")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise FilmmapInputError("site coordinates must be finite", field="x_mm")
    if ok is None:
        okb = np.ones(t.shape, dtype=bool)
    else:
        okb = np.asarray(ok)
        if okb.dtype != bool:
            raise FilmmapInputError(f"ok must be a boolean mask, got dtype {okb.dtype}",
                                    field="ok")
        try:
            okb = np.broadcast_to(okb, t.shape)
        except ValueError:
            raise FilmmapInputError(
                f"ok mask of shape {okb.shape} does not match thickness {t.shape}",
                field="ok") from None
    return t, okb & np.isfinite(t), x, y, single


def coordinate_groups(x_mm, y_mm):
    """Group wafers that share one site layout.

    Wafers of one lot may be measured at different sites (a missing site, another
    pattern); every map and statistic that assumes one layout is computed per group.

    Parameters
    ----------
    x_mm, y_mm : numpy.ndarray (n_wafers, n_sites)
        Site coordinates per wafer in mm, NaN where a wafer lacks the site.

    Yields
    ------
    rows : numpy.ndarray of int
        Wafers of the group.
    x, y : numpy.ndarray (n_sites,)
        Their shared coordinates in mm (missing sites at 0, to be masked by the caller).
    present : numpy.ndarray (n_sites,) of bool
        Sites the group has.

    References
    ----------
    .. [1] Common practice, no source.
    """
    key = np.nan_to_num(np.stack([x_mm, y_mm], axis=1), nan=np.inf)
    _, inverse = np.unique(key.reshape(key.shape[0], -1), axis=0, return_inverse=True)
    for g in np.unique(inverse):
        rows = np.nonzero(inverse.ravel() == g)[0]
        x, y = x_mm[rows[0]], y_mm[rows[0]]
        present = np.isfinite(x) & np.isfinite(y)
        yield rows, np.where(present, x, 0.0), np.where(present, y, 0.0), present
