"""Lot view: wafer-to-wafer figures and the slot profile along the boat (pure functions)."""

from filmmap.lotstats.slots import (MAD_TO_SIGMA, SlotProfile, central_slots, default_k,
                                    robust_sigma, slot_profile)
from filmmap.lotstats.wtw import (ROLES, LotArrays, WaferRow, WaferToWafer, check_lot, check_spec,
                                  in_spec, wafer_to_wafer)

__all__ = ["wafer_to_wafer", "WaferToWafer", "WaferRow", "slot_profile", "SlotProfile",
           "robust_sigma", "default_k", "central_slots", "in_spec", "check_lot", "check_spec",
           "LotArrays", "ROLES", "MAD_TO_SIGMA"]
