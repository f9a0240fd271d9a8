"""A furnace's own growth rate, learned from its recorded lots.

The rate constants describe Deal & Grove's furnaces; a real tube grows faster or
slower (its steam delivery, its thermocouple calibration, its gas flows). One lot cannot
tell a rate error from a temperature or time error (`filmmap.growth.calibrate`), but a
furnace whose every lot comes out alike is telling its own rate. Per recorded lot, the
rate factor f (multiplying B and B/A of the main oxidising step's ambient) is the one
with which the growth model grows the lot's product mean from its recipe as run, at the
mean of the zone trims in force (Brent's method on log f). Over the lots, the learned
factor is the geometric mean, with the standard error of the mean; the newest lot is
flagged when its factor departs from the earlier ones by more than three of their
standard deviations (and 1 %): a steady offset is learned, a change is what gets
flagged.

Attributing the whole rate error to one ambient is a simplification for recipes
that grow in both (a dry-wet-dry sandwich): the factor then describes the mixture as
the furnace runs it, and applies to recipes of the same kind.

References
----------
.. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
.. [2] Learning a tool's offset from its own history: common practice of run-to-run
   control, no source.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq

from filmmap.errors import FilmmapInputError
from filmmap.growth import deal_grove as dg
from filmmap.growth.calibrate import DEFAULT_INITIAL_NM
from filmmap.growth.recipe import integrate_recipe, validate_steps

CHANGE_SIGMAS = 3.0
"""The newest lot's factor is flagged when it departs by more than this many standard
deviations of the earlier lots' factors (and at least `CHANGE_FLOOR`)."""

CHANGE_FLOOR = 0.01
"""...and by more than 1 % (common practice, no source)."""


@dataclass(frozen=True)
class LearnedRate:
    """A furnace's rate factor per ambient, learned from its history.

    Attributes
    ----------
    ambient : str
        ``"O2"`` or ``"H2O"``: the ambient of the lots' main oxidising step.
    factor : float
        Geometric mean rate factor over the lots (1 = the constants as they are).
    sigma : float or None
        Standard error of the factor (None with a single lot).
    per_lot : tuple of (str, float)
        Lot id and its own factor, oldest first.
    changed : str or None
        A sentence when the newest lot departs from the earlier ones, else None.
    """

    ambient: str
    factor: float
    sigma: float | None
    per_lot: tuple
    changed: str | None

    @property
    def n_lots(self):
        return len(self.per_lot)

    def describe(self):
        s = "" if self.sigma is None else f" +/- {self.sigma:.3f}"
        return (f"{self.ambient} rate x {self.factor:.4f}{s} learned from {self.n_lots} "
                "recorded lot(s)")


def _main_ambient(steps):
    ox = [(s.minutes, s.ambient) for s in steps if s.oxidising]
    return max(ox)[1] if ox else None


def lot_rate_factor(steps, orientation, mean_nm, offset_C=0.0, initial_nm=DEFAULT_INITIAL_NM,
                    growth=None):
    """The rate factor with which the model grows ``mean_nm`` from ``steps``.

    Parameters
    ----------
    steps : sequence of Step or mapping
        The recipe as run.
    orientation : str
        ``"100"`` or ``"111"``.
    mean_nm : float
        Product mean of the lot, nm.
    offset_C : float
        Mean zone trim in force, K.
    initial_nm : float
        Oxide before the run, nm.
    growth : GrowthSettings, optional
        Pressures, thin regime and constants before the factor.

    Returns
    -------
    (str, float) or None
        The ambient and its factor; None when the recipe grows no oxide or no factor in
        0.2-5 reproduces the mean.
    """
    st = validate_steps(steps)
    ambient = _main_ambient(st)
    if ambient is None or not (mean_nm and math.isfinite(mean_nm) and mean_nm > 0):
        return None
    base = (growth.constants if growth is not None and growth.constants is not None
            else dg.load_constants())
    kw = {} if growth is None else dict(pressure_atm=growth.pressure_atm,
                                        thin_regime=growth.thin_regime)

    def miss(log_f):
        consts = {**base, ambient: {**base[ambient],
                                    "rate_factor": base[ambient].get("rate_factor", 1.0)
                                    * math.exp(log_f)}}
        return float(integrate_recipe(st, orientation, initial_nm, offset_C, constants=consts,
                                      **kw)) - mean_nm

    lo, hi = math.log(0.2), math.log(5.0)
    try:
        if miss(lo) > 0 or miss(hi) < 0:
            return None
    except FilmmapInputError:
        return None
    return ambient, math.exp(brentq(miss, lo, hi, xtol=1e-10))


def learn_rate(records, orientation="100", growth=None):
    """Learn a furnace's rate factor from its recorded lots (oldest first).

    Parameters
    ----------
    records : sequence of LotRecord
        The furnace's lots with a recipe and a product mean (others are skipped).
    orientation : str
        Silicon orientation of the lots.
    growth : GrowthSettings, optional
        The growth model before the factor (the lot file's ``[growth]``).

    Returns
    -------
    LearnedRate or None
        None when no lot can be used.
    """
    per_lot, ambient = [], None
    for r in records:
        if not r.recipe or r.lot_mean_nm is None:
            continue
        trims = [v for v in (r.applied_trims_C or {}).values() if v is not None]
        offset = float(np.mean(trims)) if trims else 0.0
        got = lot_rate_factor(r.recipe, orientation, float(r.lot_mean_nm), offset, growth=growth)
        if got is None:
            continue
        amb, f = got
        if ambient is None:
            ambient = amb
        if amb != ambient:
            continue   # a recipe of another kind: its rate is another question
        per_lot.append((r.lot_id, f))
    if not per_lot:
        return None
    logs = np.log([f for _, f in per_lot])
    factor = float(np.exp(np.mean(logs)))
    sigma = (float(factor * np.std(logs, ddof=1) / math.sqrt(logs.size))
             if logs.size >= 2 else None)
    changed = None
    if logs.size >= 3:
        earlier = logs[:-1]
        spread = float(np.std(earlier, ddof=1))
        jump = float(logs[-1] - np.mean(earlier))
        if abs(jump) > max(CHANGE_SIGMAS * spread, math.log1p(CHANGE_FLOOR)):
            changed = (f"the newest lot {per_lot[-1][0]} grew at {math.exp(jump) - 1:+.1%} "
                       f"against the furnace's earlier {logs.size - 1} lots (their scatter "
                       f"{spread:.1%}): the furnace has changed, or this run differed")
    return LearnedRate(ambient, factor, sigma, tuple(per_lot), changed)


@dataclass(frozen=True)
class LearnedCoupling:
    """A furnace's zone coupling width, estimated from lots run with different trims.

    Attributes
    ----------
    width_slots : float
        Width of the transition between neighbouring zones (10-90 %), slots.
    rms_C : float
        Rms misfit of the trim changes' predicted profiles, K.
    n_pairs : int
        Consecutive lot pairs whose applied trims differ (the evidence).
    """

    width_slots: float
    rms_C: float
    n_pairs: int

    def describe(self):
        return (f"zone coupling width {self.width_slots:g} slots, from {self.n_pairs} pair(s) "
                f"of recorded lots run with different trims (misfit {self.rms_C:.2f} K rms)")


def learn_coupling(records, zones, *, shape="logistic", widths=None, min_trim_change_K=0.5):
    """Zone coupling width from consecutive lots whose applied trims differ.

    Between two lots of one furnace the per-slot effective offsets change by the zone
    trims' difference spread through the gain matrix, plus a common part (a rate or time
    difference between the runs) and noise. The width whose gain matrix explains the
    changes best, over all such pairs, is the furnace's (a profiling run made of its
    ordinary history: `filmmap.growth.boat.coupling_width_from_profiling` does the same for
    one deliberate pair).

    Parameters
    ----------
    records : sequence of LotRecord
        One furnace's lots, oldest first, with per-slot offsets and applied trims.
    zones : sequence
        Heater zones, load end first.
    shape : {"logistic", "linear"}
        Transition shape.
    widths : sequence of float, optional
        Widths tried, slots (default 0 to 12 in steps of 0.25).
    min_trim_change_K : float
        A pair counts only when some zone's trim changed by at least this much, K.

    Returns
    -------
    LearnedCoupling or None
        None without a usable pair.
    """
    from filmmap.growth.calibrate import gain_matrix, normalise_zones

    zs = normalise_zones(zones)
    names = [z[0] for z in zs]

    def profile(r):
        return {int(s.slot): float(s.offset_C) for s in r.slots
                if s.offset_C is not None and math.isfinite(s.offset_C)}

    pairs = []
    for a, b in zip(records[:-1], records[1:]):
        ta = np.array([float((a.applied_trims_C or {}).get(n) or 0.0) for n in names])
        tb = np.array([float((b.applied_trims_C or {}).get(n) or 0.0) for n in names])
        dt = tb - ta
        if np.max(np.abs(dt)) < min_trim_change_K:
            continue
        pa, pb = profile(a), profile(b)
        common = sorted(set(pa) & set(pb))
        if len(common) < 2 * len(names):
            continue
        s = np.array(common)
        pairs.append((s, np.array([pb[k] - pa[k] for k in common]), dt))
    if not pairs:
        return None
    best = None
    for w in (np.arange(0.0, 12.01, 0.25) if widths is None else widths):
        sse, n = 0.0, 0
        for s, diff, dt in pairs:
            r = diff - gain_matrix(zs, s, float(w), shape) @ dt
            r -= r.mean()        # the common part of the change is not the trims' doing
            sse += float(np.sum(r * r))
            n += r.size
        rms = math.sqrt(sse / n)
        if best is None or rms < best[1] - 1e-12:
            best = (float(w), rms)
    return LearnedCoupling(best[0], best[1], len(pairs))
