"""Stop conditions, the runtime stop watch: a plan's ``[[stop]]`` rules judged on each point's
reduced lines (``StopCondition``), with ``consecutive`` counted over points (``StopWatch``); the
engine ends the run early, normally, when one fires."""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class StopCondition:
    """A stop condition; ``reason(lines)`` says why it fires on one point's lines, else None."""

    when: str
    threshold: float
    order: int | None = None
    side: str = "any"
    tone: str = "any"
    consecutive: int = 1

    def describe(self) -> str:
        """Human text, e.g. 'a sideband (high 1) above 5 dBm'."""
        if self.when == "tone_snr_below":
            which = "either tone" if self.tone == "any" else f"tone {self.tone}"
            text = f"SNR of {which} below {self.threshold:g} dB"
        else:
            what = "a sideband" if self.when == "sideband_above" else "any line"
            sel = []
            if self.side != "any":
                sel.append(self.side)
            if self.order is not None:
                sel.append(f"order {self.order}")
            text = f"{what}{' (' + ' '.join(sel) + ')' if sel else ''} above {self.threshold:g} dBm"
        if self.consecutive > 1:
            text += f" on {self.consecutive} consecutive points"
        return text

    def reason(self, lines: Iterable[Any]) -> str | None:
        """Why this condition fires on one point's lines (dicts or objects), or None."""
        for line in lines:
            kind, side, order = _get(line, "kind"), _get(line, "side"), _get(line, "order")
            power, detected = _get(line, "power_dbm"), _get(line, "detected", True)
            if self.when == "tone_snr_below":
                if kind != "tone" or (self.tone != "any" and side != _TONE_SIDE[self.tone]):
                    continue
                snr = _get(line, "snr_db")
                if not detected or snr is None or snr < self.threshold:
                    label = "tone a" if side == "low" else "tone b"
                    shown = "undetected" if snr is None or not detected else f"{snr:.1f} dB"
                    return f"{label} SNR {shown} < {self.threshold:g} dB"
                continue
            if self.when == "sideband_above" and kind != "sideband":
                continue
            if self.side != "any" and side != self.side:
                continue
            if self.order is not None and order != self.order:
                continue
            if detected and power is not None and power > self.threshold:
                return f"{kind} {side} {order} at {power:.2f} dBm > {self.threshold:g} dBm"
        return None


_TONE_SIDE = {"a": "low", "b": "high"}


def _get(obj: Any, name: str, default: Any = None) -> Any:
    """Attribute or mapping item, so stop conditions accept dicts and dataclasses alike."""
    if isinstance(obj, Mapping):
        return obj.get(name, default)
    return getattr(obj, name, default)


class StopWatch:
    """Tracks stop conditions over successive points (handles ``consecutive``)."""

    def __init__(self, conditions: Sequence[StopCondition]):
        self.conditions = list(conditions)
        self._streak = [0] * len(self.conditions)

    def update(self, lines: Iterable[Any]) -> str | None:
        """Feed one point's lines; returns the reason to stop, or None to go on."""
        lines = list(lines)
        for i, cond in enumerate(self.conditions):
            why = cond.reason(lines)
            self._streak[i] = self._streak[i] + 1 if why else 0
            if why and self._streak[i] >= cond.consecutive:
                return f"stop condition {i + 1} ({cond.describe()}): {why}"
        return None
