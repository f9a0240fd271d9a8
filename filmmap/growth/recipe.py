"""Oxide growth through a furnace recipe: a sequence of constant and ramped steps.

A recipe is a list of steps, each a `Step` or a mapping with the same keys::

    {"name": "oxidise", "ambient": "H2O", "minutes": 190, "at_C": 1050}
    {"name": "ramp up", "ambient": "N2", "minutes": 30, "from_C": 800, "to_C": 1050}

Ambient ``"N2"`` (inert) grows nothing; ``"O2"`` (dry) and ``"H2O"`` (wet / steam) grow by
the Deal-Grove law ``dx/dt = B / (A + 2x)``.  Every function here is vectorised over slots:
``temperature_offset_C`` (the difference between a slot's temperature and the recipe's
set point, added to every step) and ``initial_nm`` may be arrays, and the results have their
broadcast shape.

Integration.  A constant-temperature step uses the exact closed form, restarted from the
thickness at the start of the step.  A ramp is integrated in the variable
``u = x^2 + A(T) x``, for which ``du/dt = B(T) + x dA/dt``: that equation is not stiff
(its right-hand side changes only as fast as the temperature does) and reduces to the
closed form at constant temperature; it is solved with fixed-step fourth-order Runge-Kutta
on all slots at once.  With the optional Massoud thin-oxide term (dry steps only) there is
no closed form and the stiff initial transient is integrated with an implicit Radau
method at tight tolerances.

The initial regime of dry oxidation (``thin_regime``):

``"deal-grove"`` (default)
    Deal & Grove's prescription: the fast initial growth in dry O2 is represented by an
    initial oxide x_i (25 nm, from the reference file); an oxide thinner than x_i entering
    a dry step is taken as x_i at the start of that step, after which the linear-parabolic
    law holds.
``"massoud"``
    No x_i; the extra term C exp(-x/L) of Massoud et al. is added to the dry rate.
``"none"``
    Plain linear-parabolic law from the actual thickness (underestimates thin dry oxides).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.integrate import solve_ivp

from filmmap.errors import FilmmapInputError
from filmmap.growth import deal_grove as dg

#: Ambients a recipe step may name.
AMBIENTS = ("N2", "O2", "H2O")

#: Ways of treating the initial regime of dry oxidation.
THIN_REGIMES = ("deal-grove", "massoud", "none")

#: Default sane furnace temperature range for oxidising steps, degrees Celsius.
DEFAULT_TEMPERATURE_RANGE_C = (600.0, 1300.0)

_STEP_KEYS = ("name", "ambient", "minutes", "at_C", "from_C", "to_C", "pressure_atm")
_NM_PER_UM = 1000.0
_MIN_PER_H = 60.0


@dataclass(frozen=True)
class Step:
    """One recipe step.

    Parameters
    ----------
    name : str
        Label used in messages and to address the step (e.g. ``"oxidise"``).
    ambient : str
        ``"N2"`` (inert), ``"O2"`` (dry) or ``"H2O"`` (wet / steam).
    minutes : float
        Duration in minutes (> 0).
    at_C : float, optional
        Constant temperature in degrees Celsius.
    from_C, to_C : float, optional
        Linear ramp from ``from_C`` to ``to_C`` (degrees Celsius) over ``minutes``.
    pressure_atm : float, optional
        Oxidant partial pressure in atm for this step, overriding the recipe-wide value.

    Notes
    -----
    Exactly one of ``at_C`` or the pair ``from_C``/``to_C`` is given for an oxidising
    step; an N2 step may give none (its temperature does not enter the model).  Use
    `validate_steps` to build checked steps from mappings.
    """

    name: str
    ambient: str
    minutes: float
    at_C: float | None = None
    from_C: float | None = None
    to_C: float | None = None
    pressure_atm: float | None = None

    @property
    def is_ramp(self):
        """True for a linear temperature ramp."""
        return self.from_C is not None

    @property
    def oxidising(self):
        """True when the ambient grows oxide (O2 or H2O)."""
        return self.ambient != "N2"

    @property
    def start_C(self):
        """Temperature at the start of the step in degrees Celsius (None if not given)."""
        return self.from_C if self.is_ramp else self.at_C

    @property
    def end_C(self):
        """Temperature at the end of the step in degrees Celsius (None if not given)."""
        return self.to_C if self.is_ramp else self.at_C


def _label(index, name):
    return f"recipe step {index} ({name!r})" if name else f"recipe step {index}"


def _number(value, index, name, key, positive=False):
    field = f"steps[{index}].{key}"
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise FilmmapInputError(f"{_label(index, name)}: {key} must be a number, got {value!r}",
                                field=field)
    v = float(value)
    if not math.isfinite(v):
        raise FilmmapInputError(f"{_label(index, name)}: {key} must be finite, got {value!r}",
                                field=field)
    if positive and v <= 0:
        raise FilmmapInputError(f"{_label(index, name)}: {key} must be > 0, got {value!r}",
                                field=field)
    return v


def temperatures_outside_range(ambient, temperatures_C,
                               temperature_range_C=DEFAULT_TEMPERATURE_RANGE_C):
    """The temperatures of a recipe step that lie outside the furnace's accepted range.

    The one rule for step temperatures, applied by `validate_steps` and by the lot-file
    reader (`filmmap.io.read_lot_file`), so a step one accepts the other accepts too.

    Parameters
    ----------
    ambient : str
        ``"N2"``, ``"O2"`` or ``"H2O"``; an N2 step grows no oxide and its temperature
        does not enter the model, so it is never outside.
    temperatures_C : mapping of str to float or None
        ``{"at_C": ..., "from_C": ..., "to_C": ...}``, degrees Celsius; None = not given.
    temperature_range_C : (float, float)
        Accepted range of oxidising steps, degrees Celsius, inclusive.

    Returns
    -------
    list of (str, float)
        ``(key, value_C)`` of each temperature outside the range, in the mapping's order.

    Notes
    -----
    The default range, 600-1300 C, is the span of thermal oxidation the Arrhenius rate
    constants are meant for; outside it they would be extrapolated too far to advise on
    (common practice, no source).

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965) (the rate law
       whose constants the range is for).
    """
    if ambient == "N2":
        return []
    lo, hi = temperature_range_C
    return [(key, value) for key, value in temperatures_C.items()
            if value is not None and not lo <= value <= hi]


def _check_step(raw, index, temperature_range_C):
    if isinstance(raw, Step):
        data = {k: getattr(raw, k) for k in _STEP_KEYS}
    elif isinstance(raw, Mapping):
        unknown = [k for k in raw if k not in _STEP_KEYS]
        name = raw.get("name", "")
        if unknown:
            raise FilmmapInputError(
                f"{_label(index, name)}: unknown key {unknown[0]!r}; "
                f"a step takes {', '.join(_STEP_KEYS)}",
                field=f"steps[{index}].{unknown[0]}")
        data = {k: raw.get(k) for k in _STEP_KEYS}
    else:
        raise FilmmapInputError(
            f"{_label(index, '')}: a step is a Step or a mapping, got {type(raw).__name__}",
            field=f"steps[{index}]")

    name = data["name"]
    if name is None:
        name = ""
    if not isinstance(name, str):
        raise FilmmapInputError(f"{_label(index, '')}: name must be a string, got {name!r}",
                                field=f"steps[{index}].name")
    ambient = data["ambient"]
    key = ambient.strip().upper() if isinstance(ambient, str) else None
    if key not in AMBIENTS:
        raise FilmmapInputError(
            f"{_label(index, name)}: ambient must be one of {', '.join(AMBIENTS)}, got {ambient!r}",
            field=f"steps[{index}].ambient")
    if data["minutes"] is None:
        raise FilmmapInputError(f"{_label(index, name)}: minutes is missing",
                                field=f"steps[{index}].minutes")
    minutes = _number(data["minutes"], index, name, "minutes", positive=True)

    at_C, from_C, to_C = data["at_C"], data["from_C"], data["to_C"]
    if at_C is not None and (from_C is not None or to_C is not None):
        both = "from_C" if from_C is not None else "to_C"
        raise FilmmapInputError(
            f"{_label(index, name)}: give either at_C (constant) or from_C and to_C (ramp), "
            f"not both at_C and {both}",
            field=f"steps[{index}].at_C")
    if from_C is not None and to_C is None:
        raise FilmmapInputError(f"{_label(index, name)}: a ramp needs to_C as well as from_C",
                                field=f"steps[{index}].to_C")
    if to_C is not None and from_C is None:
        raise FilmmapInputError(f"{_label(index, name)}: a ramp needs from_C as well as to_C",
                                field=f"steps[{index}].from_C")
    if at_C is None and from_C is None and key != "N2":
        raise FilmmapInputError(
            f"{_label(index, name)}: an {key} step needs a temperature: at_C, or from_C and to_C",
            field=f"steps[{index}].at_C")
    temps = {k: _number(v, index, name, k)
             for k, v in (("at_C", at_C), ("from_C", from_C), ("to_C", to_C)) if v is not None}
    outside = temperatures_outside_range(key, temps, temperature_range_C)
    if outside:
        k, value = outside[0]
        lo, hi = temperature_range_C
        raise FilmmapInputError(
            f"{_label(index, name)}: {k} = {value:g} C is outside the accepted furnace range "
            f"{lo:g}-{hi:g} C (pass temperature_range_C to change it)",
            field=f"steps[{index}].{k}")
    pressure = data["pressure_atm"]
    if pressure is not None:
        pressure = _number(pressure, index, name, "pressure_atm", positive=True)
    return Step(name=name, ambient=key, minutes=minutes, at_C=temps.get("at_C"),
                from_C=temps.get("from_C"), to_C=temps.get("to_C"), pressure_atm=pressure)


def validate_steps(steps, temperature_range_C=DEFAULT_TEMPERATURE_RANGE_C):
    """Check a recipe and return it as a tuple of `Step`.

    Parameters
    ----------
    steps : sequence of Step or mapping
        The recipe, in order.
    temperature_range_C : (float, float)
        Accepted temperature range for oxidising steps in degrees Celsius.

    Returns
    -------
    tuple of Step
        Normalised steps (ambient upper-cased, numbers as float).

    Raises
    ------
    FilmmapInputError
        Naming the step (index and name) in the message and ``steps[i].key`` as the field:
        an unknown key or ambient, missing, zero or negative minutes, both ``at_C`` and a
        ramp end, a ramp missing an end, an oxidising step without temperature, a
        temperature outside ``temperature_range_C`` or a non-positive pressure.
    """
    lo, hi = (float(v) for v in temperature_range_C)
    if not lo < hi:
        raise FilmmapInputError(f"temperature_range_C must be increasing, got {temperature_range_C!r}",
                                field="temperature_range_C")
    if isinstance(steps, (str, bytes, Mapping)) or not hasattr(steps, "__iter__"):
        raise FilmmapInputError("a recipe is a list of steps", field="steps")
    out = tuple(_check_step(s, i, (lo, hi)) for i, s in enumerate(steps))
    if not out:
        raise FilmmapInputError("a recipe needs at least one step", field="steps")
    return out


def step_index(steps, step):
    """Position of a step given by index or by (unique) name.

    Parameters
    ----------
    steps : sequence of Step or mapping
        The recipe.
    step : int or str
        Index (negative counts from the end) or step name.

    Returns
    -------
    int
        Index into ``steps``.

    Raises
    ------
    FilmmapInputError
        When there is no such step or the name is ambiguous (``field='step'``).
    """
    names = [s.name if isinstance(s, Step) else (s.get("name") if isinstance(s, Mapping) else None)
             for s in steps]
    if isinstance(step, (int, np.integer)) and not isinstance(step, bool):
        i = int(step)
        if not -len(names) <= i < len(names):
            raise FilmmapInputError(f"no recipe step {i}: the recipe has {len(names)} steps",
                                    field="step")
        return i % len(names)
    hits = [i for i, n in enumerate(names) if n == step]
    if not hits:
        raise FilmmapInputError(
            f"no recipe step named {step!r}; names are {', '.join(repr(n) for n in names)}",
            field="step")
    if len(hits) > 1:
        raise FilmmapInputError(f"step name {step!r} is used by steps {hits}; address it by index",
                                field="step")
    return hits[0]


class _Kinetics:
    """Arrhenius constants of one oxidising step, evaluated on temperature arrays (um, h)."""

    def __init__(self, ambient, orientation, pressure_atm, constants=None):
        consts = dg.load_constants() if constants is None else constants
        table = consts[ambient]
        factor = dg.pressure_factor(ambient, pressure_atm)
        # a furnace's own rate factor (lot file [growth], or learned from its history)
        rate = float(table.get("rate_factor", 1.0))
        self.C1 = table["B_prefactor_um2_per_h"] * factor * rate
        self.E1 = table["B_activation_eV"]
        ratio = 1.0 if orientation == consts["B_over_A_orientation"] else consts["orientation_ratio_111_to_100"]
        self.C2 = table["B_over_A_prefactor_um_per_h"] * factor * rate / ratio
        self.E2 = table["B_over_A_activation_eV"]
        m = consts["massoud"]
        self.massoud = ambient in m["ambients"]
        self.C0 = m["C_prefactor_um_per_h"] * factor
        self.E0 = m["C_activation_eV"]
        self.L = m["decay_length_nm"] / _NM_PER_UM

    def BA(self, T_C):
        """B (um^2/h), A (um) and d ln A / dT (1/K)."""
        T_K = np.asarray(T_C, dtype=float) + 273.15
        kT = dg.BOLTZMANN_EV * T_K
        B = self.C1 * np.exp(-self.E1 / kT)
        A = B / (self.C2 * np.exp(-self.E2 / kT))
        dlnA_dT = (self.E1 - self.E2) / (kT * T_K)
        return B, A, dlnA_dT

    def C(self, T_C):
        """Massoud amplitude C in um/h."""
        kT = dg.BOLTZMANN_EV * (np.asarray(T_C, dtype=float) + 273.15)
        return self.C0 * np.exp(-self.E0 / kT)


def _x_of_u(u, A):
    return 2.0 * u / (A + np.sqrt(A * A + 4.0 * u))


def ramp_substeps(from_C, to_C):
    """Number of fixed RK4 sub-steps used for a ramp between two temperatures.

    Parameters
    ----------
    from_C, to_C : float
        Ramp end temperatures in degrees Celsius.

    Returns
    -------
    int
        16 plus one per 2 K of ramp span.  The RK4 error then stays below ~1e-5 nm even
        for a 550 K ramp over a 500 nm oxide (it grows with the thickness times the change
        of A across the ramp).  The count depends only on the span, so results are smooth
        in slot offsets and durations, as finite differences need.
    """
    return 16 + int(math.ceil(abs(float(to_C) - float(from_C)) / 2.0))


def _ramp_deal_grove(x, T0, T1, hours, kin, n):
    """RK4 in u = x^2 + A x over s in [0, 1], T = T0 + (T1 - T0) s.

    du/ds = hours * B(T) + x * dA/ds, with dA/ds = A * dlnA/dT * (T1 - T0).
    """
    dT = T1 - T0
    # rate constants at every RK4 node (sub-step ends and mid-points), all slots at once
    s = np.arange(2 * n + 1, dtype=float) / (2 * n)
    s = s.reshape((-1,) + (1,) * np.ndim(dT))
    B, A, dlnA = kin.BA(T0 + dT * s)
    G = hours * B
    H = A * dlnA * dT

    def f(j, u):
        return G[j] + _x_of_u(u, A[j]) * H[j]

    u = x * (x + A[0])
    ds = 1.0 / n
    for i in range(n):
        j = 2 * i
        k1 = f(j, u)
        k2 = f(j + 1, u + 0.5 * ds * k1)
        k3 = f(j + 1, u + 0.5 * ds * k2)
        k4 = f(j + 2, u + ds * k3)
        u = u + ds / 6.0 * (k1 + 2.0 * k2 + 2.0 * k3 + k4)
    return _x_of_u(u, A[-1])


def _massoud_ode(x, T0, T1, hours, kin):
    """dx/ds = hours (B/(A+2x) + C exp(-x/L)) on all slots, implicit Radau."""
    shape = x.shape
    x0 = np.ravel(x).astype(float)
    T0f = np.broadcast_to(T0, shape).ravel()
    dT = np.broadcast_to(T1 - T0, shape).ravel()
    h = np.broadcast_to(hours, shape).ravel()
    L = kin.L

    def rates(s, y):
        T = T0f + dT * s
        B, A, _ = kin.BA(T)
        C = kin.C(T)
        return B, A, C

    def fun(s, y):
        B, A, C = rates(s, y)
        return h * (B / (A + 2.0 * y) + C * np.exp(-y / L))

    def jac(s, y):
        B, A, C = rates(s, y)
        d = h * (-2.0 * B / (A + 2.0 * y) ** 2 - C / L * np.exp(-y / L))
        return sparse.diags(d, format="csc")

    sol = solve_ivp(fun, (0.0, 1.0), x0, method="Radau", jac=jac, rtol=1e-9, atol=1e-10)
    if not sol.success:
        raise RuntimeError(f"thin-oxide integration failed: {sol.message}")
    return sol.y[:, -1].reshape(shape)


class _Plan:
    """A validated recipe with its slot arrays, ready to integrate repeatedly."""

    def __init__(self, steps, orientation, initial_nm, temperature_offset_C, pressure_atm,
                 thin_regime, temperature_range_C, extra_shapes=(), constants=None):
        self.steps = validate_steps(steps, temperature_range_C)
        self.orientation = dg.check_orientation(orientation)
        if thin_regime not in THIN_REGIMES:
            raise FilmmapInputError(
                f"thin_regime must be one of {', '.join(THIN_REGIMES)}, got {thin_regime!r}",
                field="thin_regime")
        self.thin_regime = thin_regime
        x0 = np.asarray(initial_nm, dtype=float)
        if not np.all(np.isfinite(x0) & (x0 >= 0)):
            raise FilmmapInputError(f"initial oxide must be finite and >= 0 nm, got {initial_nm!r}",
                                    field="initial_nm")
        off = np.asarray(temperature_offset_C, dtype=float)
        if not np.all(np.isfinite(off)):
            raise FilmmapInputError("temperature offsets must be finite", field="temperature_offset_C")
        self.shape = np.broadcast_shapes(x0.shape, off.shape, *extra_shapes)
        self.x0_um = np.broadcast_to(x0, self.shape) / _NM_PER_UM
        self.offset = np.broadcast_to(off, self.shape)
        lo, hi = temperature_range_C
        self.kinetics = []
        for i, s in enumerate(self.steps):
            if not s.oxidising:
                self.kinetics.append(None)
                continue
            if off.size == 0:
                tmin = tmax = s.start_C
            else:
                tmin = min(s.start_C, s.end_C) + float(off.min())
                tmax = max(s.start_C, s.end_C) + float(off.max())
            if tmin < lo or tmax > hi:
                raise FilmmapInputError(
                    f"{_label(i, s.name)}: with the slot offsets its temperature spans "
                    f"{tmin:g}-{tmax:g} C, outside the accepted range {lo:g}-{hi:g} C",
                    field="temperature_offset_C")
            p = s.pressure_atm
            if p is None and pressure_atm is not None:
                p = pressure_atm.get(s.ambient) if isinstance(pressure_atm, Mapping) else pressure_atm
            if p is not None:
                p = np.broadcast_to(np.asarray(p, dtype=float), self.shape)
            self.kinetics.append(_Kinetics(s.ambient, self.orientation, p, constants))
        self.x_i_um = (dg.initial_oxide_nm("O2") if constants is None
                       else float(constants["O2"]["initial_oxide_nm"])) / _NM_PER_UM

    def run(self, minutes_override=None, offset_delta=0.0, record=False, start=0, x_start=None):
        """Thickness (um) after the recipe; optionally the thickness after every step.

        ``start``/``x_start`` resume at step ``start`` from thickness ``x_start`` (um).
        """
        x = np.array(self.x0_um if x_start is None else x_start, dtype=float, copy=True)
        off = self.offset + offset_delta
        history = [x.copy()] if record else None
        if x.size == 0:
            return np.stack(history * (len(self.steps) + 1)) if record else x
        for i, (s, kin) in enumerate(zip(self.steps, self.kinetics)):
            if i < start:
                continue
            if kin is not None:
                minutes = s.minutes
                if minutes_override is not None and i in minutes_override:
                    minutes = minutes_override[i]
                hours = np.broadcast_to(np.asarray(minutes, dtype=float) / _MIN_PER_H, self.shape)
                dry_thin = kin.massoud and self.thin_regime == "massoud"
                if dry_thin:
                    # skip the stiff solver where the thin-regime term cannot add 1e-9 nm
                    c_max = np.max(kin.C(np.maximum(s.start_C, s.end_C) + off))
                    bound = c_max * np.max(hours) * np.exp(-np.min(x) / kin.L)
                    dry_thin = bound > 1e-12
                if kin.massoud and self.thin_regime == "deal-grove":
                    x = np.maximum(x, self.x_i_um)
                T0 = s.start_C + off
                T1 = s.end_C + off
                if dry_thin:
                    x = _massoud_ode(x, T0, T1, hours, kin)
                elif s.is_ramp and s.from_C != s.to_C:
                    x = _ramp_deal_grove(x, T0, T1, hours, kin, ramp_substeps(s.from_C, s.to_C))
                else:
                    B, A, _ = kin.BA(T0)
                    x = dg._grow_um(x, hours, B, A)
            if record:
                history.append(np.array(x, dtype=float, copy=True))
        return np.stack(history) if record else x


def _out(a_um):
    a = np.asarray(a_um, dtype=float) * _NM_PER_UM
    return a[()] if a.ndim == 0 else a


def integrate_recipe(steps, orientation, initial_nm, temperature_offset_C=0.0, pressure_atm=None, *,
                     thin_regime="deal-grove", temperature_range_C=DEFAULT_TEMPERATURE_RANGE_C,
                     constants=None):
    """Oxide thickness at the end of a recipe, per slot.

    Parameters
    ----------
    steps : sequence of Step or mapping
        The recipe (see `Step`).
    orientation : str
        Silicon orientation, ``"100"`` or ``"111"``.
    initial_nm : array_like
        Oxide present before the first step, in nm (e.g. ~1.5 for native oxide).
    temperature_offset_C : array_like
        Per-slot temperature offset in K (= degrees C difference), added to every step's
        temperature; scalar or array (e.g. one value per slot).
    pressure_atm : float, array_like, mapping or None
        Oxidant partial pressure in atm: one value for all oxidising steps, or a mapping
        ``{"O2": p, "H2O": p}``; a step's own ``pressure_atm`` wins.  ``None`` means the
        reference pressure of the rate data: 1 atm for O2, 640 torr (0.842 atm) for H2O.
    thin_regime : {"deal-grove", "massoud", "none"}
        Treatment of the initial regime of dry oxidation (see the module notes); the
        Massoud thin-oxide term is off unless ``"massoud"`` is chosen.
    temperature_range_C : (float, float)
        Accepted temperatures of oxidising steps (after offsets), degrees Celsius.
    constants : dict, optional
        Rate constants shaped like `filmmap.growth.deal_grove.load_constants` (with an
        optional ``rate_factor`` per ambient), e.g. from the lot file's ``[growth]``
        (`filmmap.growth.settings`); None = the reference file's.

    Returns
    -------
    numpy.ndarray or float
        Final thickness in nm, shape ``broadcast(initial_nm, temperature_offset_C)``.

    Raises
    ------
    FilmmapInputError
        For an invalid recipe (naming the step and field) or argument.

    Notes
    -----
    dx/dt = B(T) / (A(T) + 2x) integrated through the steps; constant steps exactly, ramps
    by RK4 in u = x^2 + A x (see the module notes).

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    .. [2] H. Z. Massoud, J. D. Plummer and E. A. Irene, J. Electrochem. Soc. 132, 2685 (1985).
    """
    plan = _Plan(steps, orientation, initial_nm, temperature_offset_C, pressure_atm,
                 thin_regime, temperature_range_C, constants=constants)
    return _out(plan.run())


def step_thicknesses(steps, orientation, initial_nm, temperature_offset_C=0.0, pressure_atm=None, *,
                     thin_regime="deal-grove", temperature_range_C=DEFAULT_TEMPERATURE_RANGE_C,
                     constants=None):
    """Oxide thickness before the recipe and after each step, per slot.

    Parameters
    ----------
    steps, orientation, initial_nm, temperature_offset_C, pressure_atm, thin_regime, temperature_range_C
        As for `integrate_recipe`.

    Returns
    -------
    numpy.ndarray
        Thickness in nm, shape ``(len(steps) + 1, *slot_shape)``; row 0 is ``initial_nm``,
        row i the thickness after step i - 1.
    """
    plan = _Plan(steps, orientation, initial_nm, temperature_offset_C, pressure_atm,
                 thin_regime, temperature_range_C, constants=constants)
    return np.asarray(plan.run(record=True)) * _NM_PER_UM


def _five_point(f, h):
    return (f(-2 * h) - 8.0 * f(-h) + 8.0 * f(h) - f(2 * h)) / (12.0 * h)


def thickness_sensitivity_to_minutes(steps, step, orientation, initial_nm, temperature_offset_C=0.0,
                                     pressure_atm=None, *, thin_regime="deal-grove",
                                     temperature_range_C=DEFAULT_TEMPERATURE_RANGE_C,
                                     constants=None):
    """d(final thickness) / d(duration of one step), per slot.

    Parameters
    ----------
    steps, orientation, initial_nm, temperature_offset_C, pressure_atm, thin_regime, temperature_range_C
        As for `integrate_recipe`.
    step : int or str
        The step whose duration varies (index or unique name).  For a ramp, a longer
        step is a slower ramp between the same end temperatures.

    Returns
    -------
    numpy.ndarray or float
        nm per minute (0 for an N2 step).

    Notes
    -----
    Five-point central difference with a step of 1 % of the duration on the exact
    (constant steps) or fixed-step (ramps) integrator, which is smooth in the duration;
    truncation error is of relative order 1e-8.
    """
    plan = _Plan(steps, orientation, initial_nm, temperature_offset_C, pressure_atm,
                 thin_regime, temperature_range_C, constants=constants)
    k = step_index(plan.steps, step)
    m = plan.steps[k].minutes
    x_before = plan.run(record=True)[k]
    return _out(_five_point(lambda d: plan.run({k: m + d}, start=k, x_start=x_before), 0.01 * m))


def thickness_sensitivity_to_temperature(steps, orientation, initial_nm, temperature_offset_C=0.0,
                                         pressure_atm=None, *, thin_regime="deal-grove",
                                         temperature_range_C=DEFAULT_TEMPERATURE_RANGE_C,
                                         constants=None):
    """d(final thickness) / d(temperature offset applied to every step), per slot.

    Parameters
    ----------
    steps, orientation, initial_nm, temperature_offset_C, pressure_atm, thin_regime, temperature_range_C
        As for `integrate_recipe`.

    Returns
    -------
    numpy.ndarray or float
        nm per K.

    Notes
    -----
    Five-point central difference with a 0.25 K step (the rate constants change by
    about 1 % per K, so truncation error is of relative order 1e-10).
    """
    plan = _Plan(steps, orientation, initial_nm, temperature_offset_C, pressure_atm,
                 thin_regime, temperature_range_C, constants=constants)
    return _out(_five_point(lambda d: plan.run(offset_delta=d), 0.25))


def minutes_for_target(steps, step, target_nm, orientation, initial_nm, temperature_offset_C=0.0,
                       pressure_atm=None, *, thin_regime="deal-grove",
                       temperature_range_C=DEFAULT_TEMPERATURE_RANGE_C,
                       max_minutes=10000.0, on_unreachable="raise", tol_nm=1e-6, constants=None):
    """Duration of one step that makes the final thickness equal a target, per slot.

    Parameters
    ----------
    steps, orientation, initial_nm, temperature_offset_C, pressure_atm, thin_regime, temperature_range_C
        As for `integrate_recipe`.
    step : int or str
        The oxidising step whose duration is solved for (index or unique name).
    target_nm : array_like
        Wanted final thickness in nm (broadcast with the slot arrays).
    max_minutes : float
        Longest duration searched, minutes.
    on_unreachable : {"raise", "nan"}
        What to do where no duration in [0, max_minutes] reaches the target.
    tol_nm : float
        Accepted error of the final thickness in nm.

    Returns
    -------
    numpy.ndarray or float
        Minutes (0 where the other steps alone already give the target).

    Raises
    ------
    FilmmapInputError
        For an N2 step (``field='step'``) or, with ``on_unreachable="raise"``, an
        unreachable target (``field='target_nm'``).

    Notes
    -----
    The final thickness increases monotonically with the duration of an oxidising step;
    the root is bracketed by doubling and found by the Illinois variant of regula falsi on
    all slots at once.
    """
    if on_unreachable not in ("raise", "nan"):
        raise FilmmapInputError(f"on_unreachable must be 'raise' or 'nan', got {on_unreachable!r}",
                                field="on_unreachable")
    target = np.asarray(target_nm, dtype=float)
    if not np.all(np.isfinite(target) & (target >= 0)):
        raise FilmmapInputError(f"target thickness must be finite and >= 0 nm, got {target_nm!r}",
                                field="target_nm")
    plan = _Plan(steps, orientation, initial_nm, temperature_offset_C, pressure_atm,
                 thin_regime, temperature_range_C, extra_shapes=(target.shape,), constants=constants)
    k = step_index(plan.steps, step)
    s = plan.steps[k]
    if not s.oxidising:
        raise FilmmapInputError(f"{_label(k, s.name)} is an N2 step: its duration grows no oxide",
                                field="step")
    target_um = np.broadcast_to(target, plan.shape) / _NM_PER_UM
    tol = tol_nm / _NM_PER_UM

    x_before = plan.run(record=True)[k]
    def g(minutes):
        return plan.run({k: minutes}, start=k, x_start=x_before) - target_um

    lo = np.zeros(plan.shape)
    g_lo = g(lo)
    hi = np.full(plan.shape, min(max(s.minutes, 1.0), max_minutes))
    g_hi = g(hi)
    while True:
        short = (g_hi < 0) & (hi < max_minutes)
        if not short.any():
            break
        lo = np.where(short, hi, lo)
        g_lo = np.where(short, g_hi, g_lo)
        hi = np.where(short, np.minimum(2.0 * hi, max_minutes), hi)
        g_hi = g(hi)
    bad = (g_lo > tol) | (g_hi < -tol)
    if bad.any() and on_unreachable == "raise":
        idx = tuple(np.argwhere(bad)[0]) if bad.ndim else ()
        where = f" (slot {tuple(int(i) for i in idx)}; {int(bad.sum())} slot(s) affected)" if bad.ndim else ""
        want = target_um[idx] * _NM_PER_UM
        if g_lo[idx] > tol:
            why = (f"the recipe gives {(target_um[idx] + g_lo[idx]) * _NM_PER_UM:g} nm even with "
                   f"0 min of this step")
        else:
            why = (f"{max_minutes:g} min of this step give only "
                   f"{(target_um[idx] + g_hi[idx]) * _NM_PER_UM:g} nm")
        raise FilmmapInputError(
            f"{_label(k, s.name)}: a target of {want:g} nm is not reachable: {why}{where}",
            field="target_nm")

    root = np.where(np.abs(g_lo) <= tol, lo, hi)
    done = (np.abs(g_lo) <= tol) | (np.abs(g_hi) <= tol) | bad
    side = np.zeros(plan.shape)
    for _ in range(200):
        if done.all():
            break
        denom = np.where(done, 1.0, g_hi - g_lo)
        m = np.where(done, root, (lo * g_hi - hi * g_lo) / denom)
        m = np.clip(m, lo, hi)
        gm = g(m)
        conv = ~done & ((np.abs(gm) <= tol) | (hi - lo <= 1e-12 * np.maximum(hi, 1.0)))
        root = np.where(conv, m, root)
        done = done | conv
        left = ~done & (gm < 0)   # root lies in (m, hi)
        right = ~done & (gm > 0)  # root lies in (lo, m)
        g_hi = np.where(left & (side == -1), 0.5 * g_hi, g_hi)
        g_lo = np.where(right & (side == 1), 0.5 * g_lo, g_lo)
        lo = np.where(left, m, lo)
        g_lo = np.where(left, gm, g_lo)
        hi = np.where(right, m, hi)
        g_hi = np.where(right, gm, g_hi)
        side = np.where(left, -1, np.where(right, 1, side))
    root = np.where(done, root, 0.5 * (lo + hi))
    root = np.where(bad, np.nan, root)
    return root[()] if root.ndim == 0 else root
