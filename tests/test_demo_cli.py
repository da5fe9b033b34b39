"""``labrun demo``: the README's main job, end to end on the virtual lab."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from labrun.cli import main


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


def test_demo_labels_each_expanded_uncertainty_by_what_it_is(capsys):
    """A fit with a GUM budget prints 'U k=2', one without (a slope) 'U95 t', as labrun fit
    does; the demo printed 'U(k=2)' for both."""
    from types import SimpleNamespace

    from labrun.cli.demo import _print_report

    row = {"source": "statistical (fit)", "u_input": None, "unit": "", "contribution": 0.05}
    fits = {"gamma_bessel": {"value": 11.0, "stderr": 0.05, "u95": 0.2, "unit": "1/(W km)",
                             "n_points": 21, "model": "bessel", "u_combined": 0.1,
                             "budget": [row], "warnings": []},
            "slope_high_1": {"value": 3.0, "stderr": 0.001, "u95": 0.002, "unit": "dB/dB",
                             "n_points": 21, "model": "linear in dB", "budget": [],
                             "warnings": []}}
    outcome = SimpleNamespace(run_id=1, status="completed", points_done=21, points_total=21)
    _print_report(outcome, {"spool": "HNLF-A17", "model_gamma_per_w_per_km": 11.0,
                            "fits": fits, "files": []}, "demo.db")
    lines = capsys.readouterr().out.splitlines()
    (gamma,) = [ln for ln in lines if ln.strip().startswith("gamma_bessel")]
    (slope,) = [ln for ln in lines if ln.strip().startswith("slope_high_1")]
    assert ", U k=2 0.2" in gamma and ", U95 t 0.002" in slope, (gamma, slope)
