"""The fibre under test as the physics sees it: one immutable record, SI-ish lab units."""

from __future__ import annotations

from dataclasses import dataclass

from labrun.physics.units import (
    alpha_per_km,
    beta2_ps2_per_km,
    beta3_ps3_per_km,
    effective_length_km,
)


@dataclass(frozen=True)
class Fibre:
    """A spool: length, loss, nonlinearity and dispersion around a reference wavelength.

    gamma in 1/(W km); D in ps/(nm km); slope S in ps/(nm^2 km) at reference_wavelength_nm.
    """

    length_km: float
    loss_db_per_km: float
    gamma_per_w_per_km: float
    dispersion_ps_per_nm_km: float = 0.0
    dispersion_slope_ps_per_nm2_km: float = 0.0
    reference_wavelength_nm: float = 1550.0

    @property
    def alpha_per_km(self) -> float:
        """Power attenuation coefficient, 1/km."""
        return float(alpha_per_km(self.loss_db_per_km))

    @property
    def effective_length_km(self) -> float:
        """Effective nonlinear length, km."""
        return effective_length_km(self.length_km, self.loss_db_per_km)

    def dispersion_at(self, wavelength_nm: float) -> float:
        """D(lambda) in ps/(nm km), linear in the slope around the reference wavelength."""
        return self.dispersion_ps_per_nm_km + self.dispersion_slope_ps_per_nm2_km * (
            wavelength_nm - self.reference_wavelength_nm
        )

    def beta2_at(self, wavelength_nm: float) -> float:
        """beta2 in ps^2/km at a wavelength, from D(lambda) = D + S (lambda - lambda_ref)."""
        return float(beta2_ps2_per_km(self.dispersion_at(wavelength_nm), wavelength_nm))

    def beta3_at(self, wavelength_nm: float) -> float:
        """beta3 in ps^3/km at a wavelength, from D(lambda) and the slope S."""
        return float(
            beta3_ps3_per_km(
                self.dispersion_at(wavelength_nm),
                self.dispersion_slope_ps_per_nm2_km,
                wavelength_nm,
            )
        )
