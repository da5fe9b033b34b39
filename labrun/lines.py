"""Line indexing shared by the physics, the reduction, the store and every JSON output.

Lines sit on the grid ``f_a + k*delta`` (delta = f_b - f_a > 0). docs/design.md §2.1:
tone a: kind="tone", side="low", order=0 (k=0); tone b: kind="tone", side="high", order=0 (k=1);
low sideband n: kind="sideband", side="low", order=n (k=-n); high sideband n: side="high" (k=n+1).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

Kind = Literal["tone", "sideband"]
Side = Literal["low", "high"]


@dataclass(frozen=True, order=True)
class LineId:
    """Which line: kind, side and order, as in docs/design.md §2.1."""

    kind: Kind
    side: Side
    order: int

    @property
    def k(self) -> int:
        """Index on the grid f_a + k*delta."""
        return grid_index(self.kind, self.side, self.order)

    @property
    def key(self) -> str:
        """Flat column key: 'tone_low_0', 'sideband_high_2' (the point columns fits expect)."""
        return f"{self.kind}_{self.side}_{self.order}"

    def label(self) -> str:
        """Short human label: 'tone a', 'tone b', 'low 1', 'high 2'."""
        if self.kind == "tone":
            return "tone a" if self.side == "low" else "tone b"
        return f"{self.side} {self.order}"


def grid_index(kind: Kind, side: Side, order: int) -> int:
    """k of a line: 0 tone a, 1 tone b, -n low sideband n, n+1 high sideband n."""
    if kind == "tone":
        if order != 0:
            raise ValueError("tones have order 0")
        return 0 if side == "low" else 1
    if order < 1:
        raise ValueError("sidebands have order >= 1")
    return -order if side == "low" else order + 1


def line_id(k: int) -> LineId:
    """Inverse of grid_index."""
    if k == 0:
        return LineId("tone", "low", 0)
    if k == 1:
        return LineId("tone", "high", 0)
    if k < 0:
        return LineId("sideband", "low", -k)
    return LineId("sideband", "high", k - 1)


def grid_ks(orders: int) -> list[int]:
    """All k from low sideband ``orders`` to high sideband ``orders``, in frequency order."""
    return list(range(-orders, orders + 2))


def grid_freq_thz(f_a_thz: float, delta_thz: float, k: int) -> float:
    """Frequency of grid line k."""
    return f_a_thz + k * delta_thz
