"""`labrun analyze` on CSV traces: simulator output, hand-made exports with metadata, bad files."""

from __future__ import annotations

import json

import matplotlib.colors
import matplotlib.image
import numpy as np
import pytest

from labrun.cli import main
from labrun.physics.osa import synthesize_trace
from labrun.tracefile import read_trace_csv

C_NM_THZ = 299_792.458  # c in nm*THz (SI definition of c)


def _run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_analyze_reads_the_simulator_trace(tmp_path, capsys):
    trace = tmp_path / "hnlf.csv"
    code, out, _ = _run(capsys, "sim", "spectrum", "--scenario", "default-scenario.toml",
                        "--spool", "HNLF-A17", "--power-a-dbm", "12", "--power-b-dbm", "11",
                        "--wavelength-a-nm", "1550", "--spacing-ghz", "50", "--json",
                        "--out", str(trace))
    assert code == 0
    model = {(ln["kind"], ln["side"], ln["order"]): ln["power_dbm"]
             for ln in json.loads(out)["lines"]}
    osa_loss = float(read_trace_csv(trace).metadata["output_to_osa_db"])
    code, out, _ = _run(capsys, "analyze", str(trace), "--json")  # RBW from the metadata
    assert code == 0
    red = json.loads(out)
    assert set(red) >= {"spacing_ghz", "floor_dbm", "lines", "flags"}
    assert red["spacing_ghz"] == pytest.approx(50.0, abs=0.05)
    assert len(red["lines"]) == 8  # default 3 orders per side
    for ln in red["lines"]:
        assert set(ln) >= {"kind", "side", "order", "freq_thz", "wavelength_nm", "power_dbm",
                           "floor_dbm", "snr_db", "detected"}
        want = model[(ln["kind"], ln["side"], ln["order"])] - osa_loss
        if ln["detected"]:
            assert ln["power_dbm"] == pytest.approx(want, abs=0.1)
        else:
            assert ln["power_dbm"] is None and want < ln["upper_limit_dbm"]
    # Tone a at 1550 nm: f = c / lambda (SI definition of c).
    tone_a = next(ln for ln in red["lines"] if ln["kind"] == "tone" and ln["side"] == "low")
    assert tone_a["freq_thz"] == pytest.approx(C_NM_THZ / 1550.0, abs=2e-4)


def _handmade(path, *, freq_axis=False):
    """An instrument-style export: banner, key,value lines, comments, then the data."""
    rbw = 0.05
    f = 193.1 + np.array([-1, 0, 1, 2]) * 0.0625  # 62.5 GHz
    wl = C_NM_THZ / f
    x = np.arange(wl.min() - 0.6, wl.max() + 0.6, 0.01)
    y = synthesize_trace(x, wl, [-38.0, 0.0, -1.0, -39.0], rbw, floor_dbm=-65.0, noise_db=0.1,
                         rng=np.random.default_rng(4))
    head = ["Virtual OSA export v2.1", "Date,2026-03-14 02:10:44", "Label,SMF-B02 night run",
            "# rbw_nm: 0.05", "; operator: J. Okafor", ""]
    if freq_axis:
        rows = [f"{C_NM_THZ / a:.6f},{b:.3f}" for a, b in zip(x[::-1], y[::-1], strict=True)]
        header = "frequency_thz,power_dbm"
    else:
        rows = [f"{a:.4f},{b:.3f}" for a, b in zip(x, y, strict=True)]
        header = "wavelength_nm,power_dbm"
    path.write_text("\n".join(head + [header] + rows) + "\n")
    return path


def _pixels(img: np.ndarray, colour: str) -> int:
    """Pixels of a decoded PNG within 2/255 of a matplotlib colour (anti-aliased edges aside)."""
    rgb = np.array(matplotlib.colors.to_rgb(colour))
    return int(np.sum(np.all(np.abs(img[..., :3] - rgb) <= 2 / 255, axis=-1)))


@pytest.mark.parametrize("freq_axis", [False, True])
def test_analyze_handmade_csv_with_metadata(tmp_path, capsys, freq_axis):
    path = _handmade(tmp_path / "export.csv", freq_axis=freq_axis)
    plot = tmp_path / "export.png"
    code, out, err = _run(capsys, "analyze", str(path), "--orders", "1", "--json",
                          "--plot", str(plot))
    assert code == 0, err
    red = json.loads(out)
    assert red["rbw_nm"] == 0.05
    assert red["spacing_ghz"] == pytest.approx(62.5, abs=0.1)
    got = [ln["power_dbm"] for ln in red["lines"]]
    assert np.allclose(got, [-38.0, 0.0, -1.0, -39.0], atol=0.1)
    assert plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification)
    # Decoded by matplotlib's PNG reader: 10 x 5 in at 110 dpi, with the tones' markers in
    # tab:blue and the sidebands' in tab:orange (matplotlib's named colours), which only the
    # line markers use.
    img = matplotlib.image.imread(plot)
    assert img.shape[:2] == (550, 1100)
    assert _pixels(img, "tab:blue") > 10 and _pixels(img, "tab:orange") > 10


def test_analyze_table_output(tmp_path, capsys):
    path = _handmade(tmp_path / "export.csv")
    code, out, _ = _run(capsys, "analyze", str(path), "--orders", "2")
    assert code == 0
    lines = out.splitlines()
    assert lines[0].split()[0] == "line"
    assert any(r.startswith("tone a") for r in lines)
    assert "not detected" in out  # second order sits in the floor
    assert lines[-1].startswith("spacing 62.5")


@pytest.mark.parametrize("content, needle", [
    ("wavelength_nm,power_dbm\n1550.0,-3.0\n1550.1,abc\n", "line 4"),
    ("just,some\nnumbers,here\n", "no header"),
    ("wavelength_nm,power_dbm\n1550.0,-3\n", "data rows"),
])
def test_analyze_bad_file_exits_2_with_one_line(tmp_path, capsys, content, needle):
    path = tmp_path / "bad.csv"
    path.write_text("# rbw_nm: 0.02\n" + content)
    code, out, err = _run(capsys, "analyze", str(path))
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1
    assert str(path) in err and needle in err
    assert "Traceback" not in err


def test_analyze_missing_rbw_or_file(tmp_path, capsys):
    path = _handmade(tmp_path / "export.csv")
    path.write_text(path.read_text().replace("# rbw_nm: 0.05\n", ""))
    code, _, err = _run(capsys, "analyze", str(path))
    assert code == 2 and "rbw_nm" in err and len(err.strip().splitlines()) == 1
    code, _, err = _run(capsys, "analyze", str(path), "--rbw-nm", "0.05")
    assert code == 0
    code, _, err = _run(capsys, "analyze", str(tmp_path / "nope.csv"))
    assert code == 2 and "no such file" in err


def test_analyze_unwritable_plot_path_is_one_line_exit_2(tmp_path, capsys):
    path = _handmade(tmp_path / "export.csv")
    plot = tmp_path / "no-such-folder" / "trace.png"
    code, out, err = _run(capsys, "analyze", str(path), "--plot", str(plot))
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1
    assert str(plot) in err and "Traceback" not in err


@pytest.mark.parametrize("option, value", [
    ("--threshold-db", "nan"), ("--threshold-db", "inf"), ("--threshold-db", "-3"),
    ("--rbw-nm", "nan"), ("--rbw-nm", "inf"), ("--rbw-nm", "1e308"),
    ("--tones-nm", "nan"),
])
def test_analyze_options_must_be_finite_and_in_range(tmp_path, capsys, option, value):
    """issue 13: `--threshold-db nan` was accepted (no line could ever be 'detected' against it)."""
    path = _handmade(tmp_path / "export.csv")
    extra = [option, value] if option != "--tones-nm" else [option, value, "1550.8"]
    code, out, err = _run(capsys, "analyze", str(path), *extra)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and option.lstrip("-").replace("-", "_") in \
        err.replace("-", "_")


@pytest.mark.parametrize("sample, field", [
    ("1e5", "power_dbm"), ("61", "power_dbm"), ("-1e308", "power_dbm"), ("inf", "power_dbm"),
])
def test_analyze_refuses_unphysical_power_samples(tmp_path, capsys, sample, field):
    """issue 13: a 1e5 dBm sample gave a TypeError (and with --json a detected tone with a null
    power). Samples above 60 dBm (1 kW) or below -300 dBm are refused, naming file and line."""
    path = _handmade(tmp_path / "export.csv")
    lines = path.read_text().splitlines()
    row = next(i for i, ln in enumerate(lines) if ln.startswith("wavelength_nm")) + 20
    wl = lines[row].split(",")[0]
    lines[row] = f"{wl},{sample}"
    path.write_text("\n".join(lines) + "\n")
    for extra in ([], ["--json"]):
        code, out, err = _run(capsys, "analyze", str(path), *extra)
        assert code == 2 and out == ""
        assert len(err.strip().splitlines()) == 1
        assert str(path) in err and field in err and f"line {row + 1}" in err, err


def test_analyze_refuses_unphysical_wavelengths_and_non_utf8(tmp_path, capsys):
    path = _handmade(tmp_path / "export.csv")
    text = path.read_text()
    lines = text.splitlines()
    row = next(i for i, ln in enumerate(lines) if ln.startswith("wavelength_nm")) + 1
    lines[row] = "1e-300," + lines[row].split(",")[1]
    path.write_text("\n".join(lines) + "\n")
    code, out, err = _run(capsys, "analyze", str(path))
    assert code == 2 and "wavelength_nm" in err and f"line {row + 1}" in err
    path.write_bytes(text.replace("J. Okafor", "J. M\u00fcller").encode("latin-1"))
    code, out, err = _run(capsys, "analyze", str(path))
    assert code == 2 and out == "" and "not UTF-8" in err and len(err.strip().splitlines()) == 1


def test_reduction_refuses_unphysical_samples_itself():
    """The reduction checks its own input (the engine passes instrument traces straight in)."""
    from labrun.reduce import reduce_trace

    x = np.linspace(1549.0, 1551.0, 201)
    y = np.full_like(x, -60.0)
    y[100] = 1e5
    with pytest.raises(ValueError, match="power samples"):
        reduce_trace(x, y, 0.02)
    with pytest.raises(ValueError, match="threshold_db"):
        reduce_trace(x, np.full_like(x, -60.0), 0.02, threshold_db=float("nan"))
