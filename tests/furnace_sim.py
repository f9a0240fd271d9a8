"""An INVENTED drifting furnace under run-to-run control: a test and benchmark fixture.

`SyntheticFurnace` grows a boat with filmmap's growth model (Deal-Grove with heater
zones, `filmmap.growth`) on a tube whose wet-oxidation rate and zone temperatures drift
from run to run with noise; `simulate` closes the loop the way a user of filmmap would
(each run: grow -> measure the wafer means -> advice -> EWMA of the furnace state ->
next recipe, `filmmap.history.r2r`), open loop or with a given EWMA weight.

It lives with the tests, not in the package: nothing in filmmap runs it.  Used by
``tests/test_history_r2r.py`` and ``benchmarks/r2r_closed_loop.py`` (which puts this
folder on ``sys.path``).

Units: temperature offsets and trims K, time minutes, thickness nm, errors percent.

References
----------
.. [1] E. Sachs, A. Hu and A. Ingolfsson, "Run by run process control: combining SPC and
   feedback control", IEEE Trans. Semicond. Manuf. 8, 26 (1995) (from memory).
.. [2] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965) (growth model).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from filmmap.growth import (
    DEFAULT_INITIAL_NM,
    advise,
    gain_matrix,
    integrate_recipe,
    normalise_zones,
    reference_pressure_atm,
    step_index,
    validate_steps,
    with_minutes,
)
from filmmap.history.r2r import estimate_furnace, lot_offsets, next_run
from filmmap.lotstats.uniformity import nonuniformity_pct

__all__ = ["SimulationResult", "SyntheticFurnace", "simulate"]


@dataclass(frozen=True)
class SyntheticFurnace:
    """An INVENTED drifting furnace for trying run-to-run weights (not a real tube).

    Parameters
    ----------
    zones : tuple of (str, int, int)
        Heater zones with their slots, load end first.
    product_slots : tuple of int
        Slots of the product wafers (1 = load end).
    profile_C : tuple of float
        The tube's own temperature error at each product slot at run 0, K.
    rate_drift_pct_per_run : float
        Change of the wet-oxidation rate factor (steam partial pressure relative to its
        reference, scaling B and B/A) per run, percent (e.g. -0.3).
    zone_drift_C_per_run : dict
        Zone -> drift of its real temperature per run, K (a thermocouple drifting).
    rate_noise_pct : float
        Run-to-run noise of the rate factor, percent (1 standard deviation).
    wafer_noise_pct : float
        Wafer-mean noise (metrology and wafer-to-wafer), percent of the thickness.
    width_slots : float
        Zone transition width of the true zone coupling, slots (the controller may
        assume another).
    orientation : str
        Silicon orientation.

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965) (growth and
       the linear pressure dependence of B and B/A).
    """

    zones: tuple
    product_slots: tuple
    profile_C: tuple
    rate_drift_pct_per_run: float = -0.3
    zone_drift_C_per_run: dict = field(default_factory=dict)
    rate_noise_pct: float = 0.15
    wafer_noise_pct: float = 0.1
    width_slots: float = 2.0
    orientation: str = "100"

    def grow(self, run, steps, trims_C, rng):
        """Wafer-mean thickness of every product slot for one run.

        Parameters
        ----------
        run : int
            Run number, 0-based (the drifts are ``run`` times the per-run drift).
        steps : sequence of Step or mapping
            The recipe run.
        trims_C : mapping
            Zone -> trim in force, K.
        rng : numpy.random.Generator
            Noise of this run.

        Returns
        -------
        numpy.ndarray
            Wafer means, nm, one per product slot.

        References
        ----------
        .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
        """
        zs = normalise_zones(self.zones)
        slots = np.asarray(self.product_slots)
        G = gain_matrix(zs, slots, self.width_slots, "logistic")
        drift = np.array([self.zone_drift_C_per_run.get(n, 0.0) * run for n, _, _ in zs])
        trim = np.array([float(trims_C.get(n, 0.0)) for n, _, _ in zs])
        offset = np.asarray(self.profile_C, dtype=float) + G @ (drift + trim)
        factor = ((1 + self.rate_drift_pct_per_run / 100.0) ** run
                  * (1 + self.rate_noise_pct / 100.0 * rng.standard_normal()))
        p = {"H2O": factor * reference_pressure_atm("H2O"), "O2": reference_pressure_atm("O2")}
        x = integrate_recipe(steps, self.orientation, DEFAULT_INITIAL_NM, offset, p)
        return x * (1 + self.wafer_noise_pct / 100.0 * rng.standard_normal(x.shape))


@dataclass(frozen=True)
class SimulationResult:
    """One simulated sequence of runs.

    Attributes
    ----------
    weight : float or None
        EWMA weight (None: open loop, the recipe never changed).
    lot_mean_nm : numpy.ndarray
        Product mean of each run, nm.
    error_pct : numpy.ndarray
        ``100 (lot_mean / target - 1)`` per run, %.
    wtw_pct : numpy.ndarray
        Wafer-to-wafer non-uniformity of each run, %.
    minutes : numpy.ndarray
        Adjust-step duration of each run, min.
    trims_C : list of dict
        Trims in force during each run, K.
    tolerance_pct : float
        Spec half-width, %.

    References
    ----------
    .. [1] E. Sachs, A. Hu and A. Ingolfsson, IEEE Trans. Semicond. Manuf. 8, 26
       (1995) (from memory).
    """

    weight: float | None
    lot_mean_nm: np.ndarray
    error_pct: np.ndarray
    wtw_pct: np.ndarray
    minutes: np.ndarray
    trims_C: list
    tolerance_pct: float

    @property
    def mean_abs_error_pct(self):
        """Mean |error| over the runs, %."""
        return float(np.mean(np.abs(self.error_pct)))

    @property
    def max_abs_error_pct(self):
        """Largest |error|, %."""
        return float(np.max(np.abs(self.error_pct)))

    @property
    def runs_out_of_tolerance(self):
        """Runs whose lot mean is outside +/- tolerance_pct of the target (count)."""
        return int(np.sum(np.abs(self.error_pct) > self.tolerance_pct))


def simulate(furnace, steps, adjust_step, target_nm, *, weight=None, n_runs=30,
             tolerance_pct=2.0, seed=0, max_offset_C=5.0, max_time_change_pct=15.0,
             controller_width_slots=0.0):
    """Run a synthetic furnace for ``n_runs`` lots, open loop or under EWMA run-to-run control.

    Parameters
    ----------
    furnace : SyntheticFurnace
    steps : sequence of Step or mapping
        The starting recipe.
    adjust_step : str or int
        The step whose duration the controller sets.
    target_nm : float
        Target thickness, nm.
    weight : float, optional
        EWMA weight w in (0, 1]; None runs open loop (recipe and trims never changed).
    n_runs : int
        Number of runs.
    tolerance_pct : float
        Spec half-width for the tally, percent of the target.
    seed : int
        Noise seed; run k draws from ``numpy.random.default_rng([seed, k])``, so open
        loop and every weight see the same noise.
    max_offset_C, max_time_change_pct : float
        Limits of the advice and of the controller (K, %).
    controller_width_slots : float
        Zone transition width the controller's model assumes, slots.

    Returns
    -------
    SimulationResult

    Notes
    -----
    Each run: grow the lot with the recipe and trims in force (`SyntheticFurnace.grow`)
    -> measure the wafer means -> `filmmap.growth.advise` on them (what ``reduce``
    writes to advice.json) -> `lot_offsets` with the trims in force -> `estimate_furnace`
    with weight w -> `next_run`, which sets the next duration and trims.

    References
    ----------
    .. [1] E. Sachs, A. Hu and A. Ingolfsson, IEEE Trans. Semicond. Manuf. 8, 26
       (1995) (from memory).
    """
    st = validate_steps(steps)
    k = step_index(st, adjust_step)
    zs = normalise_zones(furnace.zones)
    slots = np.asarray(furnace.product_slots)
    roles = np.array(["product"] * slots.size, dtype=object)
    trims = {n: 0.0 for n, _, _ in zs}
    current = st
    history, means, wtws, minutes, trims_log = [], [], [], [], []
    for run in range(int(n_runs)):
        rng = np.random.default_rng([int(seed), run])
        x = furnace.grow(run, current, trims, rng)
        means.append(float(np.mean(x)))
        wtws.append(float(nonuniformity_pct(x)))
        minutes.append(float(current[k].minutes))
        trims_log.append(dict(trims))
        if weight is None:
            continue
        adv = advise(current, k, target_nm, zs, slots, x, roles, orientation=furnace.orientation,
                     max_offset_C=max_offset_C, max_time_change_pct=max_time_change_pct,
                     width_slots=controller_width_slots)
        history.append(lot_offsets(adv, trims, zones=zs, product_slots=slots))
        est = estimate_furnace(history, weight)
        nxt = next_run(current, k, target_nm, est, zones=zs, product_slots=slots,
                       orientation=furnace.orientation, max_offset_C=max_offset_C,
                       max_time_change_pct=max_time_change_pct,
                       width_slots=controller_width_slots)
        current = with_minutes(current, k, nxt.minutes_next)
        trims = dict(nxt.zone_trims_C)
    mean = np.array(means)
    return SimulationResult(weight=None if weight is None else float(weight), lot_mean_nm=mean,
                            error_pct=100.0 * (mean / float(target_nm) - 1.0),
                            wtw_pct=np.array(wtws), minutes=np.array(minutes),
                            trims_C=trims_log, tolerance_pct=float(tolerance_pct))
