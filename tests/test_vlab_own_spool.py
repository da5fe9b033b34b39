"""``labrun sim serve --spool-file F`` / ``--spool NAME``: one's own spool in the virtual lab.

The end-to-end check serves the lab (a real ``labrun sim serve`` process) with a spool given in
a spool file, runs a short power sweep on it, and compares the measured first upper sideband
over the output pump tone with Inoue's small-signal formula for THAT spool's gamma, length and
loss (K. Inoue, J. Lightwave Technol. 10, 1553 (1992), eqs. (1)-(3); in terms of gamma as in
G. P. Agrawal, Nonlinear Fiber Optics, ch. "Four-wave mixing"):

    P_F / P_b(L) = eta gamma^2 L_eff^2 P_a P_b,   L_eff = (1 - exp(-alpha L)) / alpha,
    eta = alpha^2 / (alpha^2 + dbeta^2)
          [1 + 4 exp(-alpha L) sin^2(dbeta L / 2) / (1 - exp(-alpha L))^2],
    dbeta = beta2 domega^2,  beta2 = -D lambda^2 / (2 pi c).

The scenario's own connected spool has another gamma, length and loss: a serve that ignored the
option would be 8.9 dB off; one that dropped the spool's D, 0.53 dB (eta).
"""

from __future__ import annotations

import json
import math
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
from _engine_support import OPERATOR, plan_text

from labrun.bench import load_bench
from labrun.cli import main
from labrun.engine import run_plan
from labrun.plan import load_plan
from labrun.queries import run_points
from labrun.store import open_store

# The scenario's spool (invented): what the lab would model if --spool-file were ignored.
SCENARIO = """
connected = "FLAT-Z1"
[[spools]]
name = "FLAT-Z1"
length_km = 2.0
loss_db_per_km = 0.5
gamma_per_w_per_km = 10.0

[realism]
enabled = false
"""
# One's own spool (invented label and values).
OWN = {"name": "DSF-T11", "length_km": 1.6, "loss_db_per_km": 0.35,
       "gamma_per_w_per_km": 4.3, "dispersion_ps_per_nm_km": 1.5,
       "dispersion_slope_ps_per_nm2_km": 0.0, "reference_wavelength_nm": 1550.0}
POWERS_DBM = (-4.0, -2.0, 0.0)  # per tone, launched into the spool
SPACING_GHZ = 100.0  # as _engine_support.plan_text sets it
C = 299_792_458.0  # m/s (SI, exact)


def spool_toml(**values: object) -> str:
    """A spool file of one [[spools]] table."""
    body = "\n".join(f"{k} = {v!r}" if not isinstance(v, str) else f'{k} = "{v}"'
                     for k, v in values.items())
    return f"[[spools]]\n{body}\n"


def plan_toml(spool: str) -> str:
    """A zipped equal-power sweep at 1550 nm, 100 GHz (invented lab values), first orders."""
    return plan_text(POWERS_DBM, orders=1, spool=spool)


def inoue_ratio_db(spool: dict, p_a_dbm: float, p_b_dbm: float) -> float:
    """First upper sideband over the output tone b, Inoue's small-signal formula (module doc)."""
    alpha = spool["loss_db_per_km"] * math.log(10) / 10.0  # 1/km
    length = spool["length_km"]
    l_eff = (1 - math.exp(-alpha * length)) / alpha
    lam = 1550e-9
    beta2 = -spool["dispersion_ps_per_nm_km"] * 1e-6 * lam**2 / (2 * math.pi * C)  # s^2/m
    dbeta = beta2 * (2 * math.pi * SPACING_GHZ * 1e9) ** 2 * 1e3  # 1/km
    t = math.exp(-alpha * length)
    eta = alpha**2 / (alpha**2 + dbeta**2) * (
        1 + 4 * t * math.sin(dbeta * length / 2) ** 2 / (1 - t) ** 2)
    p_a, p_b = 10 ** (p_a_dbm / 10) * 1e-3, 10 ** (p_b_dbm / 10) * 1e-3
    return 10 * math.log10(eta * spool["gamma_per_w_per_km"] ** 2 * l_eff**2 * p_a * p_b)


def _serve(argv: list[str]) -> subprocess.Popen:
    """Start ``labrun sim serve`` and wait until it says it runs (the bench file is written)."""
    proc = subprocess.Popen([sys.executable, "-m", "labrun", "sim", "serve", *argv],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env={**os.environ, "PYTHONUNBUFFERED": "1"})
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        line = proc.stdout.readline()
        if line.startswith("virtual lab running") or not line:
            break
    return proc


def test_served_own_spool_sideband_follows_its_gamma(tmp_path: Path) -> None:
    scenario, spool_file = tmp_path / "scenario.toml", tmp_path / "my-spool.toml"
    scenario.write_text(SCENARIO, encoding="utf-8")
    spool_file.write_text(spool_toml(**OWN), encoding="utf-8")
    plan = tmp_path / "plan.toml"
    plan.write_text(plan_toml(OWN["name"]), encoding="utf-8")
    bench_path, db = tmp_path / "bench.toml", str(tmp_path / "lab.db")
    proc = _serve(["--scenario", str(scenario), "--spool-file", str(spool_file),
                   "--bench-out", str(bench_path), "--time-scale", "0"])
    try:
        assert proc.poll() is None, proc.stderr.read()
        store = open_store(db)
        try:
            out = run_plan(load_plan(plan), load_bench(bench_path), store, operator=OPERATOR,
                           unattended=True, ack_safety=True, progress=False)
            assert out.status == "completed", out
            points = run_points(store, out.run_id, include_reference=False)
        finally:
            store.close()
        proc.send_signal(signal.SIGTERM)
        text, err = proc.communicate(timeout=20)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0, err
    assert len(points) == len(POWERS_DBM)
    for row in points.itertuples():
        measured = row.sideband_high_1 - row.tone_high_0
        expected = inoue_ratio_db(OWN, row.power_a_dbm, row.power_b_dbm)
        # 0.06 dB is gamma within 0.7 %. Measured minus Inoue is +0.015, +0.024, +0.037 dB at
        # -4, -2, 0 dBm: it grows in proportion to the power, the SPM/XPM phase mismatch the
        # virtual lab's split-step model has and Inoue's linear formula leaves out.
        assert measured == pytest.approx(expected, abs=0.06), (row, expected)
    # the scenario's spool would give 8.9 dB more, the spool without its D 0.53 dB more
    flat = {**OWN, "length_km": 2.0, "loss_db_per_km": 0.5, "gamma_per_w_per_km": 10.0,
            "dispersion_ps_per_nm_km": 0.0}
    assert abs(inoue_ratio_db(flat, 0.0, 0.0) - inoue_ratio_db(OWN, 0.0, 0.0)) > 3.0
    no_d = {**OWN, "dispersion_ps_per_nm_km": 0.0}
    assert abs(inoue_ratio_db(no_d, 0.0, 0.0) - inoue_ratio_db(OWN, 0.0, 0.0)) > 0.3


def test_spectrum_plans_on_own_spool(tmp_path, capsys):
    scenario, spool_file = tmp_path / "scenario.toml", tmp_path / "my-spool.toml"
    scenario.write_text(SCENARIO, encoding="utf-8")
    spool_file.write_text(spool_toml(**OWN), encoding="utf-8")
    code = main(["sim", "spectrum", "--scenario", str(scenario), "--spool-file", str(spool_file),
                 "--power-a-dbm", "0", "--power-b-dbm", "0", "--wavelength-a-nm", "1550",
                 "--spacing-ghz", str(SPACING_GHZ), "--orders", "1", "--json"])
    out = json.loads(capsys.readouterr().out)
    assert code == 0 and out["spool"] == OWN["name"]
    power = {(x["kind"], x["side"]): x["power_dbm"] for x in out["lines"]}
    ratio = power[("sideband", "high")] - power[("tone", "high")]
    assert ratio == pytest.approx(inoue_ratio_db(OWN, 0.0, 0.0), abs=0.06)  # as served above


def _refused(capsys, tmp_path: Path, argv: list[str], *words: str) -> None:
    """One line on stderr naming ``words``, exit 2, nothing on stdout, no server started."""
    before = set(threading.enumerate())
    code = main(["sim", "serve", "--scenario", "default-scenario.toml",
                 "--bench-out", str(tmp_path / "bench.toml"), *argv])
    out, err = capsys.readouterr()
    assert code == 2 and out == "", (code, out, err)
    assert len(err.strip().splitlines()) == 1, err
    for w in words:
        assert w in err, (w, err)
    assert set(threading.enumerate()) <= before  # no server thread
    assert not (tmp_path / "bench.toml").exists()


@pytest.mark.parametrize(("change", "field", "words"), [
    ({"length_km": -1.0}, "spools[0].length_km", ("greater than 0",)),
    ({"length_km": 0.0}, "spools[0].length_km", ("greater than 0",)),
    ({"loss_db_per_km": -0.2}, "spools[0].loss_db_per_km", ("greater than or equal to 0",)),
    ({"gamma_per_w_per_km": 0.0}, "spools[0].gamma_per_w_per_km", ("greater than 0",)),
    ({"gamma_per_w_per_km": -4.3}, "spools[0].gamma_per_w_per_km", ("greater than 0",)),
    ({"gamma_per_w_per_km": "lots"}, "spools[0].gamma_per_w_per_km", ()),
    ({"reference_wavelength_nm": 900.0}, "spools[0].reference_wavelength_nm", ()),
    ({"dispersion_slope_ps_per_nm2_km": 50.0}, "spools[0].dispersion_slope_ps_per_nm2_km", ()),
    ({"gamma_per_w_per_km": 90000.0}, "spools[0].gamma_per_w_per_km", ("reasonable time",)),
    ({"gama_per_w_per_km": 4.3}, "spools[0].gama_per_w_per_km", ()),
])
def test_bad_spool_file_value_is_one_line_exit_2(tmp_path, capsys, change, field, words):
    path = tmp_path / "my-spool.toml"
    path.write_text(spool_toml(**{**OWN, **change}), encoding="utf-8")
    _refused(capsys, tmp_path, ["--spool-file", str(path)], str(path), field, *words)


def test_missing_spool_field_is_named(tmp_path, capsys):
    path = tmp_path / "my-spool.toml"
    path.write_text(spool_toml(**{k: v for k, v in OWN.items() if k != "length_km"}),
                    encoding="utf-8")
    _refused(capsys, tmp_path, ["--spool-file", str(path)], str(path), "spools[0].length_km",
             "required field is missing")


def test_spool_file_and_option_mistakes_are_one_line_exit_2(tmp_path, capsys):
    _refused(capsys, tmp_path, ["--spool-file", str(tmp_path / "none.toml")], "none.toml",
             "--spool-file", "no such spool file")
    _refused(capsys, tmp_path, ["--spool", "NOPE-X1"], "--spool", "NOPE-X1", "HNLF-A17")
    two = tmp_path / "two.toml"
    two.write_text(spool_toml(**OWN) + spool_toml(**{**OWN, "name": "DSF-T12"}),
                   encoding="utf-8")
    _refused(capsys, tmp_path, ["--spool-file", str(two)], str(two), "--spool-file",
             "DSF-T11, DSF-T12", "--spool")
    dup = tmp_path / "dup.toml"
    dup.write_text(spool_toml(**OWN) * 2, encoding="utf-8")
    _refused(capsys, tmp_path, ["--spool-file", str(dup), "--spool", "DSF-T11"], str(dup),
             "spools[1].name", "duplicate")
    _refused(capsys, tmp_path, ["--spool-file", "default-scenario.toml"], "--spool-file",
             "a scenario, not a spool file")
    single = tmp_path / "single.toml"
    single.write_text(spool_toml(**OWN).replace("[[spools]]", "[spool]"), encoding="utf-8")
    _refused(capsys, tmp_path, ["--spool-file", str(single)], str(single), "[[spools]]")
    empty = tmp_path / "empty.toml"
    empty.write_text("# nothing here\n", encoding="utf-8")
    _refused(capsys, tmp_path, ["--spool-file", str(empty)], str(empty), "spools",
             "required field is missing")


def test_connect_spool_picks_and_replaces(tmp_path):
    from labrun.vlab.scenario import connect_spool, load_scenario

    base = load_scenario("default-scenario.toml")
    assert connect_spool(base, "SMF-B02").spool().gamma_per_w_per_km == 1.3  # scenario value
    shipped = connect_spool(base, None, "example-spool.toml")  # found by name, from any folder
    assert shipped.connected == "DSF-K07"
    assert {s.name for s in shipped.spools} == {"HNLF-A17", "SMF-B02", "DSF-K07"}
    path = tmp_path / "mine.toml"  # one of the scenario's name: the file's values replace it
    path.write_text(spool_toml(**{**OWN, "name": "SMF-B02"}), encoding="utf-8")
    mine = connect_spool(base, None, path)
    assert mine.connected == "SMF-B02" and mine.spool().gamma_per_w_per_km == 4.3
    assert len(mine.spools) == 2
    assert connect_spool(base, "HNLF-A17", path).connected == "HNLF-A17"
