"""The spool as the virtual lab and `labrun sim spectrum` see it: launched tones in, lines out.

Picks the model: the Bessel model (docs/design.md §5.2, exact without dispersion, loss included
through L_eff) when the dispersion phase over the spool is negligible, the split-step NLSE
(§5.4) otherwise. Polarisation projection (§5.5): only the part of tone b along tone a beats, so
the modulation index scales with sqrt(copolar); the Kerr phase of the total intensity acts on
both polarisation components (Manakov form). At copolar = 0 nothing beats: no sidebands, tone b
leaves with loss only. Small-signal sidebands on both sides then scale with copolar.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from labrun.lines import LineId, grid_freq_thz, grid_ks, line_id
from labrun.physics.bessel import modulation_index, two_tone_powers
from labrun.physics.fibre import Fibre
from labrun.physics.nlse import propagate_tones
from labrun.physics.units import dbm_to_w, nm_to_thz, thz_to_nm, w_to_dbm

# |beta2| (2 pi delta)^2 L below this: dispersion negligible (docs/design.md §5.2)
BESSEL_LIMIT = 1e-3
SPOOL_RTOL = 1e-3  # per-line split-step tolerance: every line down to 90 dB below the tones within
# 0.01 dB of the RK4IP reference (worst 0.005 dB measured: benchmarks/bench_nlse_accuracy.py)
MIN_POWER_DBM = -200.0  # a line with no power at all is reported at this level, never -inf
MODELS = ("auto", "bessel", "nlse")
# Largest peak nonlinear phase gamma L_eff (sqrt(Pa) + sqrt(Pb))^2 the models are asked for: the
# split-step cost grows steeply with it (measured when this bound was set, one core, 1 km of
# HNLF-like fibre at 100 GHz: about 0.8 s at 40 rad, 3 s at 86 rad, 14 s at 98 rad; earlier runs
# gave up after minutes past a few hundred rad), while FWM measurements on fibre stay below it.
MAX_NONLINEAR_PHASE_RAD = 100.0


@dataclass(frozen=True)
class ModelLine:
    """One line at the spool output: which line, where, and how strong (dBm)."""

    line: LineId
    freq_thz: float
    wavelength_nm: float
    power_dbm: float

    def to_dict(self) -> dict[str, Any]:
        """Line schema of docs/design.md §2.1: kind, side, order, freq_thz, wavelength_nm,
        power_dbm."""
        return {
            "kind": self.line.kind,
            "side": self.line.side,
            "order": self.line.order,
            "freq_thz": self.freq_thz,
            "wavelength_nm": self.wavelength_nm,
            "power_dbm": self.power_dbm,
        }


def dispersion_figure(fibre: Fibre, wavelength_a_nm: float, spacing_ghz: float) -> float:
    """max |beta2| (2 pi delta)^2 L over the two tones (beta2 there from D and S): << 1 means
    the Bessel model holds."""
    delta_thz = spacing_ghz * 1e-3
    lam_b = float(thz_to_nm(nm_to_thz(wavelength_a_nm) + delta_thz))
    b2 = max(abs(fibre.beta2_at(wavelength_a_nm)), abs(fibre.beta2_at(lam_b)))
    return b2 * (2.0 * np.pi * delta_thz) ** 2 * fibre.length_km


def nonlinear_phase_rad(fibre: Fibre, p_a_w: float, p_b_w: float) -> float:
    """Peak nonlinear phase gamma L_eff (sqrt(Pa) + sqrt(Pb))^2 of the two tones (rad)."""
    peak = (np.sqrt(p_a_w) + np.sqrt(p_b_w)) ** 2
    return float(fibre.gamma_per_w_per_km * fibre.effective_length_km * peak)


def choose_model(fibre: Fibre, wavelength_a_nm: float, spacing_ghz: float) -> str:
    """'bessel' when dispersion_figure < BESSEL_LIMIT, else 'nlse'."""
    fig = dispersion_figure(fibre, wavelength_a_nm, spacing_ghz)
    return "bessel" if fig < BESSEL_LIMIT else "nlse"


def output_powers_w(
    fibre: Fibre,
    wavelength_a_nm: float,
    spacing_ghz: float,
    p_a_w: float,
    p_b_w: float,
    orders: int = 3,
    *,
    copolar: float = 1.0,
    model: str = "auto",
    rtol: float = SPOOL_RTOL,
) -> tuple[np.ndarray, str]:
    """Line powers (W) at the spool output for k in grid_ks(orders), and the model used."""
    if model not in MODELS:
        raise ValueError(f"model must be one of {MODELS}, not {model!r}")
    if spacing_ghz <= 0:
        raise ValueError("spacing_ghz must be > 0 (tone b above tone a in frequency)")
    if not 0.0 <= copolar <= 1.0:
        raise ValueError("copolar must be within [0, 1]")
    phi = nonlinear_phase_rad(fibre, p_a_w, p_b_w)
    if not phi <= MAX_NONLINEAR_PHASE_RAD:
        raise ValueError(f"nonlinear phase {phi:.3g} rad exceeds the {MAX_NONLINEAR_PHASE_RAD:g} "
                         "rad the spool models compute in reasonable time")
    if model == "auto":
        model = choose_model(fibre, wavelength_a_nm, spacing_ghz)
    t = float(np.exp(-fibre.alpha_per_km * fibre.length_km))
    if model == "bessel":
        # Only the part of b along a beats (m scales with sqrt(copolar)); the Kerr phase of the
        # total intensity then modulates every component, so P_b keeps its full weight.
        g, l_eff = fibre.gamma_per_w_per_km, fibre.effective_length_km
        m = float(modulation_index(g, l_eff, p_a_w, copolar * p_b_w))
        return two_tone_powers(p_a_w, p_b_w, m, orders, t), model
    res = propagate_tones(
        fibre, wavelength_a_nm, spacing_ghz, p_a_w, p_b_w, orders, copolar=copolar, rtol=rtol
    )
    return res.powers_w, model


def output_lines(
    fibre: Fibre,
    wavelength_a_nm: float,
    spacing_ghz: float,
    p_a_dbm: float,
    p_b_dbm: float,
    orders: int = 3,
    *,
    copolar: float = 1.0,
    model: str = "auto",
    rtol: float = SPOOL_RTOL,
) -> list[ModelLine]:
    """Tones and sidebands at the spool output (dBm), in frequency order, labelled by LineId.

    p_a_dbm, p_b_dbm are launched into the spool; tone b sits spacing_ghz above tone a.
    model: "bessel", "nlse" or "auto" (bessel when dispersion is negligible, else nlse).
    """
    powers, _ = output_powers_w(
        fibre,
        wavelength_a_nm,
        spacing_ghz,
        float(dbm_to_w(p_a_dbm)),
        float(dbm_to_w(p_b_dbm)),
        orders,
        copolar=copolar,
        model=model,
        rtol=rtol,
    )
    f_a = float(nm_to_thz(wavelength_a_nm))
    delta = spacing_ghz * 1e-3
    dbm = np.maximum(w_to_dbm(powers), MIN_POWER_DBM)
    out = []
    for k, p in zip(grid_ks(orders), dbm, strict=True):
        f = grid_freq_thz(f_a, delta, k)
        out.append(ModelLine(line_id(k), f, float(thz_to_nm(f)), float(p)))
    return out
