"""Variable optical attenuator adapter: attenuation in dB, wavelength in nm, shutter."""

from __future__ import annotations

from labrun.errors import InstrumentError
from labrun.instruments.base import WavelengthAdapter


class AttenuatorAdapter(WavelengthAdapter):
    """One variable attenuator (role attenuator_a or attenuator_b)."""

    kind = "attenuator"

    def set_attenuation_db(self, db: float) -> None:
        self.apply("set_attenuation_db", db)

    def attenuation_db(self) -> float:
        return self.read("read_attenuation_db")

    @property
    def max_attenuation_db(self) -> float:
        """The top of the profile's attenuation range: the darkest setting."""
        rng = self.profile.op("set_attenuation_db").range
        assert rng is not None  # profiles.py requires a range for value settings
        return rng[1]

    def output_on(self, *, settle: bool = True) -> None:
        """Open the shutter (``settle`` False: the caller waits its settle time)."""
        self.apply("output_on", expect=True if self._reports_state() else None, settle=settle)

    def output_off(self) -> None:
        """Close the shutter."""
        self.apply("output_off", expect=False if self._reports_state() else None)

    def output_state(self) -> bool | None:
        """True when the shutter is open, None when not reported."""
        if not self.profile.capabilities.output_state:
            return None
        return self.optional_read("read_output_state")

    def safe_off(self) -> None:
        """Attenuation to maximum and shutter closed; tries both even if one fails."""
        problems: list[str] = []
        steps = [lambda: self.set_attenuation_db(self.max_attenuation_db)]
        if self.profile.has("output_off"):
            steps.append(self.output_off)
        for step in steps:
            try:
                step()
            except Exception as exc:  # keep going: the other step may still darken the path
                problems.append(str(exc))
        if problems:
            raise InstrumentError("; ".join(problems), role=self.role,
                                  resource=self.spec.resource)

    def _reports_state(self) -> bool:
        return self.profile.capabilities.output_state and self.profile.has("read_output_state")
