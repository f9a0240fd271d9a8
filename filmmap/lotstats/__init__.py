"""Lot statistics: the lot view and every lot figure, computed once (pure functions).

`lot_view` (module `view`) turns the lot dataset into the `LotView` that summary.json,
summary.csv, report.html, report.pdf and the run history all present. Its parts, one
module per idea: `uniformity` (the one non-uniformity definition), `roles` (wafer roles
from [boat]), `exclusion` (the minimum-usable-sites rule), `causes` (failure causes),
`wtw` (wafer-to-wafer figures), `slots` (the slot profile and edge slots) and `evidence`
(which sites' spectra the report shows as evidence).
"""

from filmmap.lotstats.causes import count_causes, failure_cause
from filmmap.lotstats.exclusion import DEFAULT_MIN_SITES, lot_means, usable_wafers
from filmmap.lotstats.roles import ROLES, roles_from_boat
from filmmap.lotstats.slots import (MAD_TO_SIGMA, SlotProfile, central_slots, default_k,
                                    robust_sigma, slot_profile)
from filmmap.lotstats.uniformity import nonuniformity_pct, percent_of_mean
from filmmap.lotstats.view import FailedSite, LotView, WaferLine, lot_view, with_boat_model
from filmmap.lotstats.wtw import (LotArrays, WaferRow, WaferToWafer, check_lot, check_spec,
                                  in_spec, wafer_to_wafer)

__all__ = ["lot_view", "with_boat_model", "LotView", "WaferLine", "FailedSite",
           "DEFAULT_MIN_SITES", "usable_wafers", "lot_means", "ROLES", "roles_from_boat",
           "nonuniformity_pct", "percent_of_mean", "count_causes", "failure_cause",
           "wafer_to_wafer", "WaferToWafer", "WaferRow", "slot_profile", "SlotProfile",
           "robust_sigma", "default_k", "central_slots", "in_spec", "check_lot", "check_spec",
           "LotArrays", "MAD_TO_SIGMA"]
