"""``TraceData``: a trace on its way into the store, without SQLAlchemy (the engine builds one per
trace before the store is even open; ``labrun.store.db`` writes it)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # numpy is imported where traces are encoded
    import numpy as np


@dataclass
class TraceData:
    """A trace to store: x (nm or THz), y (dBm per RBW) and how it was taken."""

    x: np.ndarray
    y: np.ndarray
    kind: str = "output"
    x_unit: str = "nm"
    rbw_nm: float | None = None
    settings: dict[str, Any] = field(default_factory=dict)
