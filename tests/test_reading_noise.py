"""The Birge-ratio check's per-point reading noise is the bench's ``[calibration]
osa_reading_noise_db`` (default 0.1 dB, common practice for a grating OSA on lines well above
its floor): it reaches the check, and a stated larger noise lowers the Birge ratio as
R_B = rms sqrt(n / (n - p)) / sigma, sigma = sqrt(u_osa^2 + noise^2) says (the reduced
chi-square, Birge, Phys. Rev. 40, 207 (1932); sigma the root-sum-square of independent
standard uncertainties, JCGM 100:2008 5.1.2). Line powers are the split-step spool model's with
an invented +-0.05 dB alternation on the sidebands (a demo scatter); spool values invented."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from labrun.bench import parse_bench
from labrun.exactfit import fit_spool
from labrun.physics.fibre import Fibre
from labrun.physics.spool import output_lines
from labrun.uncertainty import Uncertainties

FIB = Fibre(1.0, 0.9, 11.0, -0.3, 0.019, 1550.0)  # invented highly nonlinear spool
U_OSA = 0.05


def _row(i: int, p_dbm: float, spacing: float) -> dict:
    row = {"power_a_dbm": p_dbm, "power_b_dbm": p_dbm, "spacing_ghz": spacing,
           "wavelength_a_nm": 1550.0}
    for ln in output_lines(FIB, 1550.0, spacing, p_dbm, p_dbm, 2):
        wiggle = 0.05 * (-1) ** i if ln.line.kind == "sideband" else 0.0
        row[f"{ln.line.kind}_{ln.line.side}_{ln.line.order}"] = ln.power_dbm + wiggle
    return row


@pytest.fixture(scope="module")
def runs() -> list[list[dict]]:
    power = [_row(i, p, 200.0) for i, p in enumerate(np.arange(0.0, 8.5, 2.0))]
    spacing = [_row(i, 5.0, s) for i, s in enumerate((50.0, 150.0, 250.0, 350.0))]
    return [power, spacing]


def _unc(noise: float | None) -> Uncertainties:
    """Uncertainties from a bench file's [calibration] stating ``noise`` (None: not stated)."""
    text = ('[bench]\nname = "b"\nmax_total_launched_dbm = 20.0\n[calibration]\n'
            f"osa_amplitude_u_db = {U_OSA}\n"
            + (f"osa_reading_noise_db = {noise}\n" if noise is not None else "")
            + '[instruments.osa]\nresource = "TCPIP0::127.0.0.1::5106::SOCKET"\n'
            'profile = "generic-osa"\n')
    return Uncertainties.from_calibration(parse_bench(text, Path("b.toml")).calibration)


def test_default_is_the_documented_0_1_db() -> None:
    assert _unc(None).reading_noise_db == 0.1
    assert _unc(0.3).reading_noise_db == 0.3


@pytest.mark.parametrize("power_only", [True, False], ids=["closed-form", "exact"])
def test_a_stated_larger_noise_lowers_the_birge_ratio(runs, power_only) -> None:
    data = runs[:1] if power_only else runs
    if power_only:  # no spacing column: the closed-form path of fit_spool
        data = [[{k: v for k, v in r.items() if k != "spacing_ghz"} for r in data[0]]]
    base = fit_spool(data, FIB.length_km, FIB.loss_db_per_km, uncertainties=_unc(None))
    loud = fit_spool(data, FIB.length_km, FIB.loss_db_per_km, uncertainties=_unc(0.4))
    checked = [k for k in ("gamma", "gamma_small_signal", "gamma_bessel", "dispersion")
               if k in base and "birge_ratio" in base[k].extra]
    assert checked and ("gamma" in checked) is not power_only
    for k in checked:
        r = base[k]
        assert r.residual_rms > 0.01, k  # the demo scatter is seen
        expected = math.hypot(U_OSA, 0.1) / math.hypot(U_OSA, 0.4)  # 0.271
        assert loud[k].extra["birge_ratio"] / r.extra["birge_ratio"] == pytest.approx(
            expected, rel=1e-9), k
        p = 1 if k.startswith("gamma") else (3 if "dispersion_slope" in base else 2)
        assert r.extra["birge_ratio"] == pytest.approx(
            r.residual_rms * math.sqrt(r.n_points / (r.n_points - p))
            / math.hypot(U_OSA, 0.1), rel=1e-9), k


def test_a_bad_reading_noise_is_one_line_exit_2(tmp_path, capsys) -> None:
    from labrun.cli import main
    from labrun.resources import find_file

    text = Path(find_file("bench-pyvisa-sim.toml", "sim_instruments")).read_text(encoding="utf-8")
    bench = tmp_path / "bench.toml"
    bench.write_text(text.replace("[calibration]\n", "[calibration]\nosa_reading_noise_db = 0\n"),
                     encoding="utf-8")
    (tmp_path / "fwm-devices.yaml").write_text("spec: '1.1'\n")
    plan = find_file("power-sweep.toml", "sweeps")
    assert main(["check", str(plan), "--bench", str(bench), "--json"]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and str(bench) in err and "calibration.osa_reading_noise_db" in err
