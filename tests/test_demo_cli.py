"""``labrun demo``: the README's main job, end to end on the virtual lab."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from labrun.cli import main
from labrun.spoolfits import D_SOURCE


def test_demo_runs_stores_fits_and_plots(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    out, db = tmp_path / "out", tmp_path / "demo.db"
    code = main(["demo", "--out", str(out), "--db", str(db), "--json", "--no-progress"])
    report = json.loads(capsys.readouterr().out)
    assert code == 0
    assert report["run"]["status"] == "completed"
    assert report["run"]["points_done"] == report["run"]["points_total"] == 25
    assert db.is_file()
    fits = report["fits"]
    # The virtual lab's spool has gamma 11 /(W km) (invented); launched-power offsets of a few
    # hundredths of a dB (scenario realism) allow a few percent.
    assert fits["gamma_bessel"]["value"] == pytest.approx(11.0, rel=0.05)
    # Small-signal first and second sidebands grow 3 and 5 dB/dB: J_n(m) ~ (m/2)^n / n!
    # (Abramowitz and Stegun 9.1.7), the power-law of docs/design.md §5.2.
    assert fits["slope_high_1"]["value"] == pytest.approx(3.0, abs=0.05)
    assert fits["slope_high_2"]["value"] == pytest.approx(5.0, abs=0.1)
    for name in ("fits.json", "last-trace.png", "sideband-vs-power.png"):
        assert (out / name).stat().st_size > 0
    # The demo fits as a lab would with labrun: a data-sheet-like D put on the spool record
    # (invented: the scenario's D, -0.3 ps/(nm km) in default-scenario.toml, with u 0.1), then
    # the path of labrun fit (exact model, stored, the D a row of gamma's GUM budget).
    rec = report["dispersion_record"]
    assert rec["d_ps_per_nm_km"] == -0.3 and rec["u_ps_per_nm_km"] == 0.1
    assert "invented for the demo" in rec["note"]
    assert report["fit"]["fit_id"] is not None and report["fit"]["runs"] == [1]
    gamma = fits["gamma"]
    assert gamma["dispersion_used"]["d_ps_per_nm_km"] == -0.3
    assert any(row["source"] == D_SOURCE for row in gamma["budget"])
    assert abs(gamma["value"] - 11.0) <= gamma["u95"]  # truth inside U (k = 2)
    assert main(["spools", "--db", str(db), "--json"]) == 0
    (row,) = json.loads(capsys.readouterr().out)["spools"]
    assert row["headline_fit"] == report["fit"]["fit_id"]  # stored like labrun fit's


def test_demo_unwritable_output_is_one_line(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    blocker = tmp_path / "file"
    blocker.write_text("not a folder")
    code = main(["demo", "--out", str(blocker / "sub"), "--db", str(tmp_path / "d.db")])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert len(err.splitlines()) == 1 and "--out" in err


def test_an_interrupted_demo_ends_without_fits_or_report(tmp_path: Path) -> None:
    """Ctrl-C in a demo at time scale 1: exit 130 soon after, the run 'interrupted' with what it
    stored, and no fits or report written after the user asked to stop."""
    import os
    import signal
    import subprocess
    import sys
    import time

    out, db = tmp_path / "out", tmp_path / "demo.db"
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    proc = subprocess.Popen([sys.executable, "-m", "labrun", "demo", "--out", str(out), "--db",
                             str(db), "--time-scale", "1", "--no-progress"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    try:
        assert proc.stderr is not None
        for line in proc.stderr:  # the run starts once the virtual lab is up
            if line.startswith("virtual lab up"):
                break
        time.sleep(1.5)  # a point or two at time scale 1 (the lab's own sweep and settle times)
        proc.send_signal(signal.SIGINT)
        stdout, _ = proc.communicate(timeout=60)
    finally:
        proc.kill()
    assert proc.returncode == 130, stdout
    assert "interrupted" in stdout and "no fits and no report" in stdout
    assert not (out / "report.html").exists() and not (out / "fits.json").exists()


def test_demo_prints_the_fit_as_labrun_fit_does(capsys):
    """The demo's fit block is labrun fit's own text (fit_text): the same labels (U k=2, U95 t),
    budget table and D line, not a format of its own."""
    from types import SimpleNamespace

    from labrun.cli.demo import _print_report
    from labrun.cli.fit import fit_text
    from labrun.spoolfits import FitRecord, ParameterRecord

    row = {"source": "statistical (fit)", "u_input": None, "unit": "", "contribution": 0.05}
    params = {"gamma": ParameterRecord(11.0, 0.05, 0.2, "1/(W km)", "split-step", 21, 0.0,
                                       {"u_combined": 0.1, "budget": [row]}),
              "slope_high_1": ParameterRecord(3.0, 0.001, 0.002, "dB/dB", "linear in dB", 21,
                                              0.0, {})}
    record = FitRecord(spool="HNLF-A17", run_ids=[1], parameters=params, fit_id=4)
    outcome = SimpleNamespace(run_id=1, status="completed", points_done=21, points_total=21)
    _print_report(outcome, {"spool": "HNLF-A17", "model_gamma_per_w_per_km": 11.0,
                            "record": record, "files": [],
                            "dispersion_record": {"note": "spool HNLF-A17: recorded D"}},
                  "demo.db")
    text = capsys.readouterr().out
    assert fit_text(record) in text
    assert "U k=2 0.2" in text and "U95 t 0.002" in text
