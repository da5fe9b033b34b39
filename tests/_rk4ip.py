"""Independent reference NLSE solver for the tests: fourth-order Runge-Kutta in the interaction
picture (RK4IP), fixed step.

Hult, "A fourth-order Runge-Kutta in the interaction picture method for simulating
supercontinuum generation in optical fibers", J. Lightwave Technol. 25(12), 3770-3775 (2007),
equations (8)-(11). Written from the paper and the NLSE of Agrawal (Nonlinear Fiber Optics):

    dA/dz = -(alpha/2) A - i (beta2/2) d2A/dT2 + (beta3/6) d3A/dT3 + i gamma |A|^2 A

on a time grid, A(T) sampled over one beat period 1/delta of the tone set. Deliberately shares
no code with labrun.physics.nlse (a different scheme, its own grid, its own operators): the
dispersion operator is built in the time domain's Fourier variable omega of numpy.fft, with
d/dT -> -i omega for fields A(T) = sum_k a_k exp(-i omega_k T).
"""

from __future__ import annotations

import numpy as np


def rk4ip_tones(
    p_a_w: float,
    p_b_w: float,
    spacing_thz: float,
    length_km: float,
    alpha_per_km: float,
    beta2_ps2_per_km: float,
    beta3_ps3_per_km: float,
    gamma_per_w_per_km: float,
    *,
    copolar: float = 1.0,
    n_time: int = 256,
    n_steps: int = 2000,
) -> dict[int, float]:
    """Line powers (W) by grid index k (tone a at k = 0, tone b at k = 1) at the output."""
    period_ps = 1.0 / spacing_thz
    t = np.arange(n_time) * period_ps / n_time
    omega_a, omega_b = 0.0, 2.0 * np.pi * spacing_thz  # rad/ps, offsets from tone a
    # Two Jones components: x carries tone a and the part of b along a, y the rest of b.
    ax = np.sqrt(p_a_w) * np.exp(-1j * omega_a * t) + np.sqrt(copolar * p_b_w) * np.exp(
        -1j * omega_b * t
    )
    ay = np.sqrt((1.0 - copolar) * p_b_w) * np.exp(-1j * omega_b * t)
    field = np.stack([ax, ay])
    # Angular frequencies of the FFT bins for exp(-i omega T) fields: numpy's forward FFT uses
    # exp(-2 pi i k n / N), so the coefficient of exp(-i omega_k T) sits in the *inverse* FFT.
    omega = 2.0 * np.pi * np.fft.fftfreq(n_time, d=period_ps / n_time)
    # Linear part in the frequency domain: d/dT -> -i omega.
    lin = (
        -alpha_per_km / 2.0
        - 1j * (beta2_ps2_per_km / 2.0) * (-1j * omega) ** 2
        + (beta3_ps3_per_km / 6.0) * (-1j * omega) ** 3
    )
    h = length_km / n_steps
    half = np.exp(lin * h / 2.0)

    def to_freq(a: np.ndarray) -> np.ndarray:
        return np.fft.ifft(a, axis=-1)

    def to_time(s: np.ndarray) -> np.ndarray:
        return np.fft.fft(s, axis=-1)

    def nonlinear(s: np.ndarray) -> np.ndarray:
        """h N(A) A in the frequency domain, N = i gamma (|A_x|^2 + |A_y|^2) (Manakov form)."""
        a = to_time(s)
        inten = np.sum(np.abs(a) ** 2, axis=0)
        return h * to_freq(1j * gamma_per_w_per_km * inten * a)

    s = to_freq(field)
    for _ in range(n_steps):
        s_i = half * s
        k1 = half * nonlinear(s)
        k2 = nonlinear(s_i + k1 / 2.0)
        k3 = nonlinear(s_i + k2 / 2.0)
        k4 = nonlinear(half * (s_i + k3))
        s = half * (s_i + k1 / 6.0 + k2 / 3.0 + k3 / 3.0) + k4 / 6.0
    power = np.sum(np.abs(s) ** 2, axis=0)
    k_of_bin = np.rint(np.fft.fftfreq(n_time, d=1.0 / n_time)).astype(int)
    return {int(k): float(p) for k, p in zip(k_of_bin, power, strict=True)}
