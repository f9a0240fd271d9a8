"""Wafer roles along the boat, from the lot file's [boat] section."""

from __future__ import annotations

import numpy as np

#: The roles a wafer can have in a boat.
ROLES = ("product", "monitor", "dummy")

__all__ = ["ROLES", "roles_from_boat"]


def roles_from_boat(slots, boat):
    """``"dummy"``, ``"monitor"`` or ``"product"`` for each slot.

    Parameters
    ----------
    slots : array_like of int
        Boat slot of each wafer (1 = load/door end).
    boat : BoatConfig or None
        The lot file's [boat] (or any object with ``dummy_slots`` and ``monitor_slots``);
        every slot it does not list holds a product wafer. None = all product.

    Returns
    -------
    numpy.ndarray of str (object), same length as `slots`

    References
    ----------
    .. [1] Dummy wafers at the boat ends, monitors among the product: common practice,
       no source.
    """
    dummies = {int(s) for s in (getattr(boat, "dummy_slots", None) or ())}
    monitors = {int(s) for s in (getattr(boat, "monitor_slots", None) or ())}
    return np.array(["dummy" if int(s) in dummies else "monitor" if int(s) in monitors
                     else "product" for s in np.asarray(slots).ravel()], dtype=object)
