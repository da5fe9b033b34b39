"""Line powers of equal-tone points from the RK4IP reference solver (tests/_rk4ip.py), as the
columns a point table carries: shared by the tests that fit reference data."""

from __future__ import annotations

import math
from collections.abc import Iterable

from _rk4ip import rk4ip_tones

from labrun.lines import line_id
from labrun.physics.fibre import Fibre


def rk4ip_lines(fib: Fibre, p_dbm: float, spacing_ghz: float, lam_nm: float,
                ks: Iterable[int] = range(-2, 4), n_steps: int = 200) -> dict[str, float]:
    """Columns ``<kind>_<side>_<order>`` (dBm) of lines ``ks`` for two tones of p_dbm each,
    spacing_ghz apart, the fibre's dispersion taken at lam_nm."""
    p = 10 ** (p_dbm / 10) * 1e-3
    ref = rk4ip_tones(p, p, spacing_ghz * 1e-3, fib.length_km, fib.alpha_per_km,
                      fib.beta2_at(lam_nm), fib.beta3_at(lam_nm), fib.gamma_per_w_per_km,
                      n_time=64, n_steps=n_steps)
    out = {}
    for k in ks:
        ln = line_id(k)
        out[f"{ln.kind}_{ln.side}_{ln.order}"] = 10 * math.log10(ref[k] * 1e3)
    return out
