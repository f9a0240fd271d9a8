"""A film stack: ambient / layers (top first) / semi-infinite substrate."""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from filmmap.materials import Material, get_material
from filmmap.optics import transfer


@dataclass(frozen=True)
class Layer:
    """One film of the stack.

    Parameters
    ----------
    material : str or Material
        Registry name (e.g. ``"SiO2"``) or a Material.
    thickness_nm : float
        Physical thickness in nm (the nominal, when fitted).
    name : str, optional
        Label used in results (default: the material name).
    """

    material: Material | str
    thickness_nm: float = 0.0
    name: str | None = None

    def __post_init__(self):
        object.__setattr__(self, "material", get_material(self.material))
        if self.name is None:
            object.__setattr__(self, "name", self.material.name)
        if not np.isfinite(self.thickness_nm) or self.thickness_nm < 0:
            raise ValueError(f"layer {self.name}: thickness_nm must be finite and >= 0")


@dataclass(frozen=True)
class Stack:
    """Ambient / layers / substrate, the optical model of a measured site.

    Parameters
    ----------
    substrate : str or Material
        Semi-infinite substrate, e.g. ``"Si"``.
    layers : sequence of Layer
        Films, top layer first.
    ambient : str or Material
        Incidence medium (default ``"air"``, n = 1).
    """

    substrate: Material | str
    layers: tuple = field(default_factory=tuple)
    ambient: Material | str = "air"

    def __post_init__(self):
        object.__setattr__(self, "substrate", get_material(self.substrate))
        object.__setattr__(self, "ambient", get_material(self.ambient))
        object.__setattr__(self, "layers", tuple(
            layer if isinstance(layer, Layer) else Layer(*layer) for layer in self.layers))

    @property
    def thicknesses(self):
        """Nominal layer thicknesses in nm, top first."""
        return [layer.thickness_nm for layer in self.layers]

    def with_thickness(self, **by_name):
        """A copy with some layers' thicknesses changed (keys are layer names)."""
        layers = [replace(layer, thickness_nm=by_name.get(layer.name, layer.thickness_nm))
                  for layer in self.layers]
        return replace(self, layers=tuple(layers))

    def indices(self, wavelength_nm):
        """Complex indices at the wavelengths: (N_ambient, [N_layer...], N_substrate)."""
        wl = np.asarray(wavelength_nm, dtype=float)
        return (self.ambient(wl), [layer.material(wl) for layer in self.layers],
                self.substrate(wl))

    def describe(self):
        """Lines naming each medium with its model and published source."""
        out = [f"ambient   {self.ambient.describe()}"]
        for layer in self.layers:
            out.append(f"layer     {layer.name} {layer.thickness_nm:g} nm; {layer.material.describe()}")
        out.append(f"substrate {self.substrate.describe()}")
        return out

    def _thickness_arrays(self, thickness_nm):
        if thickness_nm is None:
            return [np.asarray(t, dtype=float) for t in self.thicknesses]
        if len(thickness_nm) != len(self.layers):
            raise ValueError(f"stack has {len(self.layers)} layers, got {len(thickness_nm)} thicknesses")
        return [np.asarray(t, dtype=float) for t in thickness_nm]

    def reflectance(self, wavelength_nm, angle_deg=0.0, polarization="u", thickness_nm=None,
                    derivatives=False):
        """Reflectance (fraction) at the wavelengths; see `filmmap.optics.transfer.reflectance`.

        Parameters
        ----------
        wavelength_nm : array_like
            Vacuum wavelengths in nm (last axis of the result).
        angle_deg : float
            Angle of incidence in degrees.
        polarization : {"u", "s", "p"}
            Unpolarised by default.
        thickness_nm : sequence of array_like, optional
            Per-layer thickness arrays (nm) to evaluate many stacks at once, e.g.
            ``[d[:, None]]`` for a batch of one-layer stacks; default: nominal.
        derivatives : bool
            Also return dR/dd per layer (1/nm).
        """
        N0, Nl, Ns = self.indices(wavelength_nm)
        return transfer.reflectance(wavelength_nm, N0, Nl, self._thickness_arrays(thickness_nm), Ns,
                                    angle_deg, polarization, derivatives)

    def psi_delta(self, wavelength_nm, angle_deg, thickness_nm=None, derivatives=False):
        """Psi and Delta in degrees; see `filmmap.optics.transfer.psi_delta`."""
        N0, Nl, Ns = self.indices(wavelength_nm)
        return transfer.psi_delta(wavelength_nm, N0, Nl, self._thickness_arrays(thickness_nm), Ns,
                                  angle_deg, derivatives)
