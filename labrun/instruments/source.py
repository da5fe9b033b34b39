"""Light sources (lasers, amplifier): power under the bench cap, emission on/off, safe_off()."""

from __future__ import annotations

from typing import Any

from labrun.errors import SafetyError
from labrun.instruments.base import FLOAT_SLACK, Adapter, PlannedSetting


class SourceAdapter(Adapter):
    """Power and emission control shared by lasers and the amplifier."""

    @property
    def cap_dbm(self) -> float | None:
        """The bench's hard cap for this source (max_power_dbm)."""
        return self.spec.max_power_dbm

    def set_power_dbm(self, dbm: float) -> None:
        """Set the output power; refused above the bench cap or the profile range."""
        self.apply("set_power_dbm", dbm, cap=self.cap_dbm)

    def planned(self, method: str, value: Any) -> list[PlannedSetting]:
        """As Adapter.planned; the power is checked against the bench cap too."""
        if method == "set_power_dbm":
            return [self.prepare(method, value, cap=self.cap_dbm)]
        return super().planned(method, value)

    def power_dbm(self) -> float:
        """The power setting as the instrument reports it."""
        return self.read("read_power_dbm")

    def output_state(self) -> bool | None:
        """True when emitting, None when the instrument does not report it."""
        if not self.profile.capabilities.output_state:
            return None
        return self.optional_read("read_output_state")

    def interlock_closed(self) -> bool | None:
        """True when the interlock allows emission, None when the instrument does not report it."""
        if not self.profile.capabilities.interlock:
            return None
        return self.optional_read("read_interlock")

    def output_on(self, *, settle: bool = True) -> None:
        """Enable emission, after checking the interlock and that the set power is under the cap;
        sent once (a lost connection is the caller's to retry, checks included). ``settle``
        False: the caller waits the operation's settle time, overlapped with other settles."""
        if self.interlock_closed() is False:
            raise SafetyError(f"{self.role}: interlock is open; emission not enabled")
        if self.cap_dbm is not None and self.profile.has("read_power_dbm"):
            current = self.power_dbm()
            if current > self.cap_dbm + FLOAT_SLACK:
                raise SafetyError(f"{self.role}: power is set to {current:.9g} dBm, "
                                  f"{current - self.cap_dbm:.2g} dB above the bench cap "
                                  f"{self.cap_dbm:g} dBm; emission not enabled")
        # Never resent by the session after a lost connection: the instrument may have reset
        # (another power, perhaps above the cap); the run's retry sets the power and checks again.
        with self.session.single_attempt():
            self.apply("output_on", expect=True if self._reports_state() else None,
                       settle=settle)

    def output_off(self) -> None:
        """Disable emission (verified by read-back where the instrument reports its state)."""
        self.apply("output_off", expect=False if self._reports_state() else None)

    def safe_off(self) -> None:
        """Leave the source dark: emission off."""
        self.output_off()

    def _reports_state(self) -> bool:
        return self.profile.capabilities.output_state and self.profile.has("read_output_state")
