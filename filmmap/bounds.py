"""Physical and practical bounds on every number a lot file, a spectra file or an option carries.

One place for the limits stated in docs/formats.md ("Bounds"): a value beyond them is not
a film, a furnace or a measurement filmmap can reason about, and accepting it would only
move the failure later (an overflow, hours of work, gigabytes of memory).  Each bound says
where it comes from; "common practice, no source" marks a practical choice.
"""

from __future__ import annotations

import math

from filmmap.errors import FilmmapInputError

MAX_STEP_MINUTES = 7 * 24 * 60.0
"""Longest recipe step, min: one week; thermal oxidation steps last minutes to a day or two
(common practice, no source)."""

TEMPERATURE_RANGE_C = (0.0, 1400.0)
"""Recipe step temperatures, deg C, exclusive of 0: silicon melts at 1414 C (CRC Handbook of
Chemistry and Physics)."""

MAX_BOAT_SLOTS = 1200
"""Boat slots and wafers per lot: furnace boats hold 25-200 wafers; 1,200 leaves room for
test lots while keeping memory bounded (common practice, no source)."""

MAX_SITES_PER_WAFER = 10000
"""Measured sites per wafer: dense maps have a few thousand (common practice, no source)."""

MAX_WAVELENGTHS = 20000
"""Spectral values per spectrum (per channel): spectrometer detectors have 512-4096 pixels
(common practice, no source)."""

MAX_ID_CHARS = 64
"""Lot and wafer ids, characters: SEMI M12/T7 wafer ids have 12-18 (common practice beyond
that, no source)."""

MAX_WAFER_DIAMETER_MM = 450.0
"""Wafer diameter, mm: the largest standardised silicon wafer is 450 mm (SEMI M1, from
memory); 300 mm is today's largest in production."""

MAX_TEMPERATURE_OFFSET_K = 100.0
"""Per-slot effective temperature offsets read from an advice.json, K: far beyond any
furnace's zone control (common practice, no source)."""

DEFAULT_MAX_OFFSET_C = 5.0
"""Zone-trim limit, K, for a lot file without [furnace] (the default of furnace.max_offset_C)."""

MAX_BASELINE_LOTS = 10000
"""Lots in a control-chart baseline window (common practice, no source)."""

MAX_WORKERS = 256
"""Processes for --workers (common practice, no source)."""


def finite_number(text, option, what, shown=None):
    """A finite float parsed from command-line TEXT, or an error naming OPTION.

    ``shown`` is the whole item quoted in the message (default TEXT).
    """
    shown = text if shown is None else shown
    try:
        value = float(text)
    except (TypeError, ValueError):
        raise FilmmapInputError(f"expected {what}, got {shown!r}", field=option) from None
    if not math.isfinite(value):
        raise FilmmapInputError(f"expected {what} with a finite number, got {shown!r}",
                                field=option)
    return value


def check_in_range(value, option, lo, hi, what, lo_open=False, hi_open=False):
    """VALUE inside [lo, hi] (open ends as asked), else an error naming OPTION and the range."""
    low_ok = value > lo if lo_open else value >= lo
    high_ok = value < hi if hi_open else value <= hi
    if not (low_ok and high_ok):
        span = f"{'(' if lo_open else '['}{lo:g}, {hi:g}{')' if hi_open else ']'}"
        raise FilmmapInputError(f"{what} = {value:g} is outside {span}; expected a value "
                                f"in {span}", field=option)
    return value


def check_zone_trims(trims, config, option):
    """Zone trims (K) of the command line against the lot file's furnace.

    Parameters
    ----------
    trims : mapping of str to float or None
    config : filmmap.io.lotfile.LotConfig
    option : str
        ``--applied-trims`` or ``--trim``.

    Raises
    ------
    FilmmapInputError
        Trims for a lot file without ``[furnace]`` zones, a zone the furnace does not
        have, or a trim beyond ``furnace.max_offset_C`` (the furnace's configured limit).
    """
    if not trims:
        return
    if config.furnace is None:
        raise FilmmapInputError(f"zone trims need the lot file's [furnace] zones, and "
                                f"{config.path} has none", field=option)
    names = [z.name for z in config.furnace.zones]
    limit = config.furnace.max_offset_C
    for zone, value in trims.items():
        if zone not in names:
            raise FilmmapInputError(f"zone {zone!r} is not a zone of the furnace in "
                                    f"{config.path}; expected one of {', '.join(names)}",
                                    field=option)
        if not (math.isfinite(value) and abs(value) <= limit):
            raise FilmmapInputError(f"trim {zone}={value:g} K is beyond the furnace's limit "
                                    f"max_offset_C = {limit:g} K; expected |trim| <= {limit:g}",
                                    field=option)
