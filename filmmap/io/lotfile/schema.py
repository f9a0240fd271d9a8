"""The lot file's schema: every key it knows and the typed result of reading it.

The dataclasses are what `filmmap.io.read_lot_file` returns; `KEYS` lists the keys of
each table (any other key is an error naming it and suggesting the closest valid one).
"""

from __future__ import annotations

import datetime
from dataclasses import dataclass, field
from pathlib import Path

from filmmap.growth.deal_grove import OXIDANTS
from filmmap.growth.recipe import AMBIENTS, Step
from filmmap.io.layouts import DEFAULT_LAYOUT
from filmmap.materials import Material

__all__ = ["LotConfig", "LotInfo", "MeasurementConfig", "StackConfig", "LayerConfig",
           "CauchySpec", "TargetConfig", "BoatConfig", "Zone", "FurnaceConfig", "GrowthConfig",
           "RecipeStep", "KEYS", "AMBIENTS", "OXIDISING_AMBIENTS", "LOT_TECHNIQUES",
           "DEFAULT_MAX_LOT_BYTES", "MAX_SEARCH_NM", "RATE_BOUNDS"]

#: Techniques a lot can declare.
LOT_TECHNIQUES = ("reflectance", "ellipsometry")

#: The recipe step ambients that grow oxide (`AMBIENTS` are those of `filmmap.growth.Step`).
OXIDISING_AMBIENTS = OXIDANTS

#: Largest lot file read by default (bytes).
DEFAULT_MAX_LOT_BYTES = 4 * 2**20

#: Every key the lot file knows, by table ("" is the top level): any other is an error.
KEYS = {
    "": ("lot", "measurement", "stack", "target", "boat", "furnace", "recipe", "growth"),
    "lot": ("id", "furnace", "run_date"),
    "measurement": ("technique", "angle_deg", "files", "wafer_diameter_mm", "edge_exclusion_mm",
                    "reflectance_unit", "dark_file", "reference_file", "fit_offset",
                    "offset_sigma", "scale_sigma", "wavelength_shift_sigma_nm",
                    "angle_offset_sigma_deg", "delta_convention", "layout", "site_map",
                    "slot_map", "file_pattern", "data_dir"),
    "stack": ("substrate", "orientation", "layer"),
    "stack.layer": ("material", "nk_file", "cauchy", "thickness_nm", "search_nm", "fit",
                    "index_scale", "fit_index_scale"),
    "stack.layer.cauchy": ("A", "B", "C", "range_nm"),
    "target": ("thickness_nm", "tolerance_pct", "adjust_step"),
    "boat": ("slots", "dummy_slots", "monitor_slots"),
    "furnace": ("zones", "max_offset_C", "max_time_change_pct", "coupling_width_slots"),
    "growth": ("wet_source", "h2o_pressure_atm", "o2_pressure_atm", "thin_regime",
               "initial_oxide_nm", "massoud", "O2", "H2O"),
    "growth.massoud": ("C_prefactor_um_per_h", "C_activation_eV", "decay_length_nm"),
    "growth.ambient": ("B_prefactor_um2_per_h", "B_activation_eV", "B_over_A_prefactor_um_per_h",
                       "B_over_A_activation_eV", "rate_factor"),
    "furnace.zones": ("name", "slots"),
    "recipe": ("step",),
    "recipe.step": ("name", "ambient", "minutes", "at_C", "from_C", "to_C"),
}

MAX_SEARCH_NM = 50000.0
"""Largest accepted search_nm upper end and target thickness (50 um, far above any thermal
oxide)."""

#: Bounds of the rate-constant overrides: far outside any published value, inside which a
#: typo (an exponent off by ten) is still caught.
RATE_BOUNDS = {"B_prefactor_um2_per_h": (1e-3, 1e8), "B_activation_eV": (0.1, 5.0),
               "B_over_A_prefactor_um_per_h": (1e2, 1e14), "B_over_A_activation_eV": (0.1, 5.0),
               "rate_factor": (0.2, 5.0), "C_prefactor_um_per_h": (1.0, 1e14),
               "C_activation_eV": (0.1, 5.0), "decay_length_nm": (0.1, 100.0)}


@dataclass(frozen=True)
class LotInfo:
    """``[lot]``: which lot.

    Attributes
    ----------
    id : str
        Lot id.
    furnace : str or None
        Furnace (tube) name.
    run_date : datetime.date or None
        Date of the furnace run.
    """

    id: str
    furnace: str | None = None
    run_date: datetime.date | None = None


@dataclass(frozen=True)
class MeasurementConfig:
    """``[measurement]``: how the wafers were measured and where the files are.

    Attributes
    ----------
    technique : str
        ``"reflectance"`` or ``"ellipsometry"``.
    angle_deg : float
        Angle of incidence in air, degrees.
    files : tuple of pathlib.Path
        Data files matched by the globs, sorted, absolute.
    file_globs : tuple of str
        The globs as written.
    wafer_diameter_mm : float
        Wafer diameter, mm.
    edge_exclusion_mm : float
        Edge exclusion, mm.
    reflectance_unit : str
        ``"fraction"`` or ``"percent"`` (unit of ``R@`` columns).
    dark_file, reference_file : pathlib.Path or None
        Raw-intensity mode spectra (absolute paths).
    fit_offset : bool or None
        Former switch for the reflectance offset, kept as an alias: true = fit the
        offset (under ``offset_sigma``, default prior), false = ``offset_sigma = 0``.
    offset_sigma, scale_sigma : float or None
        Prior standard deviations of the reflectance offset (fraction of R) and of
        the relative reflectance scale (fraction); None = the technique's default
        (`filmmap.fitting.systematics`), 0 = not fitted.
    wavelength_shift_sigma_nm : float or None
        Prior standard deviation of the wavelength-calibration shift, nm.
    angle_offset_sigma_deg : float or None
        Prior standard deviation of the angle-of-incidence offset, degrees.
    delta_convention : str
        ``"handbook"`` (Delta = 180 deg for a bare transparent substrate below
        Brewster: Azzam & Bashara 1977, Tompkins 1993; the default) or
        ``"reversed"`` (the instrument writes 360 - Delta; filmmap converts).
    layout : str
        Input layout of the data files (`filmmap.io.layouts.LAYOUTS`), default
        `filmmap.io.layouts.DEFAULT_LAYOUT`.
    site_map : str, pathlib.Path or None
        A built-in pattern name (``"polar-49"``, ``"cartesian-25"``) or a CSV file
        ``site,x_mm,y_mm`` (absolute path) giving the site positions.
    slot_map : pathlib.Path or None
        CSV file ``wafer,slot``.
    file_pattern : str or None
        File-name pattern with ``{wafer}``, ``{site}``, ``{slot}`` fields.
    data_dir : pathlib.Path or None
        Folder the ``files`` globs are relative to, when the lot file names one
        (``data_dir``, absolute or relative to the lot folder; it may lie outside the
        lot folder or be a symbolic link, because the user named it). None: the lot
        folder, sandboxed.
    """

    technique: str
    angle_deg: float
    files: tuple
    file_globs: tuple
    wafer_diameter_mm: float = 150.0
    edge_exclusion_mm: float = 3.0
    reflectance_unit: str = "fraction"
    dark_file: Path | None = None
    reference_file: Path | None = None
    fit_offset: bool | None = None
    offset_sigma: float | None = None
    scale_sigma: float | None = None
    wavelength_shift_sigma_nm: float | None = None
    angle_offset_sigma_deg: float | None = None
    delta_convention: str = "handbook"
    layout: str = DEFAULT_LAYOUT
    site_map: object = None
    slot_map: Path | None = None
    file_pattern: str | None = None
    data_dir: Path | None = None

    @property
    def raw_intensity(self):
        """True when the data files hold raw ``I@<nm>`` intensities."""
        return self.reference_file is not None

    @property
    def file_technique(self):
        """Technique to read the data files with (`filmmap.io.read_spectra`)."""
        return "intensity" if self.raw_intensity else self.technique

    @property
    def file_unit(self):
        """Unit of the reflectance in the data files (``"fraction"`` for raw counts, which
        hold none)."""
        return "fraction" if self.raw_intensity else self.reflectance_unit


@dataclass(frozen=True)
class CauchySpec:
    """Inline Cauchy coefficients of a user material.

    Attributes
    ----------
    A : float
        Constant term (dimensionless).
    B_um2 : float
        Coefficient of lambda^-2, um^2.
    C_um4 : float
        Coefficient of lambda^-4, um^4.
    range_nm : (float, float)
        Validity range, nm.
    """

    A: float
    B_um2: float = 0.0
    C_um4: float = 0.0
    range_nm: tuple = (200.0, 2000.0)


@dataclass(frozen=True)
class LayerConfig:
    """One ``[[stack.layer]]``.

    Attributes
    ----------
    material : str
        Material name.
    model : filmmap.materials.Material
        The resolved optical model.
    source : str
        ``"registry"``, ``"nk_file"`` or ``"cauchy"``.
    nk_file : pathlib.Path or None
        The n, k table of a user material.
    cauchy : CauchySpec or None
        The Cauchy coefficients of a user material.
    thickness_nm : float or None
        Nominal thickness, nm.
    search_nm : (float, float) or None
        Thickness search range, nm.
    fit : bool
        Whether the thickness is fitted.
    index_scale : float
        Factor on the material's complex index (1 = the dispersion model as it is),
        e.g. 1.003 for a dense thermal oxide whose index sits above the fused-silica
        Sellmeier curve.
    fit_index_scale : bool
        Fit that factor (started at ``index_scale``) with the thickness.
    """

    material: str
    model: Material
    source: str = "registry"
    nk_file: Path | None = None
    cauchy: CauchySpec | None = None
    thickness_nm: float | None = None
    search_nm: tuple | None = None
    fit: bool = True
    index_scale: float = 1.0
    fit_index_scale: bool = False


@dataclass(frozen=True)
class StackConfig:
    """``[stack]``: substrate and layers (top first).

    Attributes
    ----------
    substrate : str
        Registry name of the substrate.
    orientation : str
        Crystal orientation of the substrate surface, ``"100"`` or ``"111"``.
    layers : tuple of LayerConfig
        Top layer first.
    """

    substrate: str
    orientation: str
    layers: tuple

    @property
    def top_fitted(self):
        """Index of the top (first) fitted layer, or None."""
        return next((i for i, layer in enumerate(self.layers) if layer.fit), None)


@dataclass(frozen=True)
class TargetConfig:
    """``[target]``: the wanted thickness of the top fitted layer.

    Attributes
    ----------
    thickness_nm : float
        Target thickness, nm.
    tolerance_pct : float
        Allowed deviation, percent of the target.
    adjust_step : str or None
        Name of the recipe step whose time/temperature is adjusted.
    """

    thickness_nm: float
    tolerance_pct: float
    adjust_step: str | None = None


@dataclass(frozen=True)
class BoatConfig:
    """``[boat]``: the wafer boat.

    Attributes
    ----------
    slots : int
        Number of slots (1 = load/door end).
    dummy_slots : tuple of int
        Slots holding dummy wafers.
    monitor_slots : tuple of int
        Slots holding monitor wafers.
    """

    slots: int
    dummy_slots: tuple = ()
    monitor_slots: tuple = ()


@dataclass(frozen=True)
class Zone:
    """One heater zone: a contiguous slot range.

    Attributes
    ----------
    name : str
        Zone name.
    first_slot, last_slot : int
        Inclusive slot range.
    """

    name: str
    first_slot: int
    last_slot: int

    def __contains__(self, slot):
        return self.first_slot <= slot <= self.last_slot


@dataclass(frozen=True)
class FurnaceConfig:
    """``[furnace]``: heater zones (load end first) and adjustment limits.

    Attributes
    ----------
    zones : tuple of Zone
        Contiguous, non-overlapping, load end first.
    max_offset_C : float
        Largest zone temperature offset to propose, deg C.
    max_time_change_pct : float
        Largest step-time change to propose, percent.
    coupling_width_slots : float or None
        Width of the transition between neighbouring zones in the zone-to-slot model,
        slots (10-90 %); None = a sharp step (docs/furnace.md says how to measure it).
    """

    zones: tuple
    max_offset_C: float = 5.0
    max_time_change_pct: float = 15.0
    coupling_width_slots: float | None = None

    def zone_of(self, slot):
        """The `Zone` holding ``slot``, or None."""
        return next((z for z in self.zones if slot in z), None)


#: The recipe step of a lot file: `filmmap.growth.Step` itself, checked by the lot-file reader
#: with the rules of `filmmap.growth.validate_steps`. The name is kept as an alias so code
#: written against it keeps working; new code names `filmmap.growth.Step`.
RecipeStep = Step


@dataclass(frozen=True)
class LotConfig:
    """A whole lot file.

    Attributes
    ----------
    path : pathlib.Path
        The lot file (absolute).
    folder : pathlib.Path
        Its folder (absolute); relative paths are resolved against it.
    sha256 : str
        Hex SHA-256 of the lot file bytes.
    lot : LotInfo
    measurement : MeasurementConfig
    stack : StackConfig
    target : TargetConfig or None
    boat : BoatConfig or None
    furnace : FurnaceConfig or None
    recipe : tuple of filmmap.growth.Step
        In order; empty when the file has no recipe. Checked by the reader as the growth
        model checks a recipe (`filmmap.growth.validate_steps`).
    growth : GrowthConfig or None
        The growth model's pressures, thin regime and constants, when given.
    """

    path: Path
    folder: Path
    sha256: str
    lot: LotInfo
    measurement: MeasurementConfig
    stack: StackConfig
    target: TargetConfig | None
    boat: BoatConfig | None
    furnace: FurnaceConfig | None
    recipe: tuple = ()
    growth: GrowthConfig | None = None

    def step(self, name):
        """The recipe step called ``name``, or None."""
        return next((s for s in self.recipe if s.name == name), None)


@dataclass(frozen=True)
class GrowthConfig:
    """``[growth]``: the growth model in the furnace owner's hands.

    Attributes
    ----------
    wet_source : str or None
        ``"bubbler"`` (H2O at 640 torr, Deal & Grove's own data) or ``"pyrogenic"``
        (H2/O2 torch, near 1 atm of steam); None = the rate data's reference (640 torr).
    h2o_pressure_atm, o2_pressure_atm : float or None
        Oxidant partial pressures, atm (override ``wet_source``).
    thin_regime : str or None
        Dry-oxidation thin regime: ``"deal-grove"`` (initial-oxide rule), ``"massoud"``
        or ``"none"``; None = ``"deal-grove"``.
    initial_oxide_nm : float or None
        Deal-Grove initial-oxide offset x_i of dry oxidation, nm.
    massoud : dict
        Overrides of the Massoud term (``C_prefactor_um_per_h``, ``C_activation_eV``,
        ``decay_length_nm``).
    ambients : dict
        Per ambient (``"O2"``, ``"H2O"``) overrides of ``B_prefactor_um2_per_h``,
        ``B_activation_eV``, ``B_over_A_prefactor_um_per_h``, ``B_over_A_activation_eV`` and
        ``rate_factor``.
    """

    wet_source: str | None = None
    h2o_pressure_atm: float | None = None
    o2_pressure_atm: float | None = None
    thin_regime: str | None = None
    initial_oxide_nm: float | None = None
    massoud: dict = field(default_factory=dict)
    ambients: dict = field(default_factory=dict)
