"""Optics: transfer-matrix (Fresnel-Airy) reflectance and ellipsometry of film stacks."""

from filmmap.optics.stack import Layer, Stack
from filmmap.optics.transfer import (interface_r, normal_wavevector, psi_delta,
                                     psi_delta_from_rho, reflectance, reflectance_from_r, stack_r)

__all__ = ["Layer", "Stack", "stack_r", "reflectance", "psi_delta", "psi_delta_from_rho",
           "reflectance_from_r", "interface_r", "normal_wavevector"]
