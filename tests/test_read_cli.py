"""The read side on a stored virtual-lab run, on SQLite and PostgreSQL: ``labrun runs``, ``show``,
``compare`` (side by side and one spool's history) and ``export`` in every format, each file read
back with its own library (pandas' CSV reader, pyarrow, scipy.io, h5py) and compared with the store.
"""

from __future__ import annotations

import json
import math

import h5py
import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import scipy.io
from _store_support import run_plan_file

from labrun.cli import main
from labrun.queries import point_trace, run_points
from labrun.spoolfits import FitRecord, ParameterRecord, store_fit
from labrun.store import open_store

PNG = b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948, 5.2)


@pytest.fixture(scope="module", params=["sqlite", "postgresql"])
def db(request, tmp_path_factory):
    """A store with the shipped HNLF-A17 power sweep (run 1), fitted once (fit 1)."""
    folder = tmp_path_factory.mktemp("readdb")

    def build(url):
        run_plan_file(url, "power-sweep.toml", folder)
        assert main(["fit", "1", "--db", url]) == 0
        return url

    if request.param == "sqlite":
        yield build(str(folder / "runs.db"))
        return
    from conftest import pg_schema

    with pg_schema() as url:
        yield build(url)


def _json(capsys, *argv):
    capsys.readouterr()
    assert main([*argv, "--json"]) == 0, capsys.readouterr().err
    return json.loads(capsys.readouterr().out)


def _error_line(capsys, *argv):
    capsys.readouterr()
    assert main(list(argv)) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    return err[0]


def test_runs_and_filters(db, capsys):
    rows = _json(capsys, "runs", "--db", db)["runs"]
    assert [r["run_id"] for r in rows] == [1]
    r = rows[0]
    assert r["spool"] == "HNLF-A17" and r["status"] == "completed"
    assert r["points_done"] == r["points_total"] == 25
    assert _json(capsys, "runs", "--db", db, "--spool", "SMF-B02")["runs"] == []
    assert _json(capsys, "runs", "--db", db, "--status", "aborted")["runs"] == []
    assert len(_json(capsys, "runs", "--db", db, "--since", "2000-01-01")["runs"]) == 1
    assert _json(capsys, "runs", "--db", db, "--since", "2999-01-01")["runs"] == []
    assert "--since" in _error_line(capsys, "runs", "--db", db, "--since", "spring")
    assert main(["runs", "--db", db]) == 0 and "HNLF-A17" in capsys.readouterr().out


def test_show(db, capsys):
    rep = _json(capsys, "show", "1", "--db", db)
    assert rep["run_id"] == 1 and rep["spool"]["label"] == "HNLF-A17"
    assert rep["points_done"] == 25 and rep["events"][0]["kind"] == "safety_ack"
    assert rep["events"][-1]["kind"] == "completed"
    assert 1 in [f["fit_id"] for f in rep["fits"]]
    assert "no run 7" in _error_line(capsys, "show", "7", "--db", db)
    assert main(["show", "1", "--db", db]) == 0 and "HNLF-A17" in capsys.readouterr().out


def _synthetic_fit(db, label, gamma, u95, runs):
    """A stored fit with given gamma and U95 (stderr = U95 / 2), for history checks."""
    store = open_store(db)
    try:
        spool_id = store.spool_id(label, length_km=1.0, loss_db_per_km=0.9)
        p = ParameterRecord(value=gamma, stderr=u95 / 2, u95=u95, unit="1/(W km)",
                            model="test", n_points=10, residual_rms=0.0)
        return store_fit(store, spool_id, FitRecord(spool=label, run_ids=runs,
                                                    parameters={"gamma_bessel": p},
                                                    spool_snapshot={"length_km": 1.0,
                                                                    "loss_db_per_km": 0.9}))
    finally:
        store.close()


def test_compare_side_by_side(db, capsys, tmp_path):
    _synthetic_fit(db, "HNLF-B05", 9.0, 0.2, [])
    fit1 = _json(capsys, "fit", "1", "--db", db, "--no-store")["parameters"]["gamma"]
    plot = tmp_path / "cmp.png"
    rep = _json(capsys, "compare", "HNLF-A17", "HNLF-B05", "--db", db, "--plot", str(plot))
    a, b = rep["spools"]
    assert (a["spool"], b["spool"]) == ("HNLF-A17", "HNLF-B05")
    g = a["gamma_per_w_per_km"]
    assert g["value"] == pytest.approx(fit1["value"], rel=1e-12) and g["runs"] == [1]
    assert set(g) >= {"value", "stderr", "u95", "unit", "model", "runs"}
    assert b["gamma_per_w_per_km"]["value"] == 9.0
    # effective length (1 - exp(-alpha L)) / alpha, alpha = 0.9 dB/km / (10 log10 e) (Agrawal,
    # Nonlinear Fiber Optics, eq. 4.1.6 context: L_eff definition)
    alpha = 0.9 / (10 * math.log10(math.e))
    l_eff = (1 - math.exp(-alpha * 1.0)) / alpha
    assert a["effective_length_km"]["value"] == pytest.approx(l_eff, rel=1e-12)
    # first sideband over output pump at 0 dBm per tone with no fitted D (eta = 1, Inoue 1992):
    # gamma^2 L_eff^2 P_a P_b, and its uncertainty 20 log10(e) u(gamma) / gamma
    eff = a["first_sideband_efficiency_db"]
    assert eff["value"] == pytest.approx(10 * math.log10((g["value"] * l_eff * 1e-3) ** 2),
                                         abs=1e-9)
    assert eff["stderr"] == pytest.approx(20 * math.log10(math.e) * g["stderr"] / g["value"],
                                          rel=1e-9)
    assert plot.read_bytes()[:8] == PNG
    assert "no spool 'NOPE'" in _error_line(capsys, "compare", "HNLF-A17", "NOPE", "--db", db)
    assert main(["compare", "HNLF-A17", "HNLF-B05", "--db", db]) == 0
    assert "gamma" in capsys.readouterr().out


def test_compare_history_flags_changes_beyond_combined_u95(db, capsys, tmp_path):
    # U95 = 0.2 each: combined sqrt(0.2^2 + 0.2^2) = 0.283. A step of 0.25 is inside it (but
    # beyond one U95: fails if a single U were used); 0.30 is beyond it (but inside U1 + U2 = 0.4:
    # fails if the U95s were added linearly).
    ids = [_synthetic_fit(db, "DSF-C11", v, 0.2, [1]) for v in (10.0, 10.25, 10.55)]
    plot = tmp_path / "hist.png"
    rep = _json(capsys, "compare", "DSF-C11", "--db", db, "--plot", str(plot))
    assert [h["fit_id"] for h in rep["history"]] == ids
    assert [h["changed"] for h in rep["history"]] == [[], [], ["gamma_per_w_per_km"]]
    assert rep["changed"] is True
    assert plot.read_bytes()[:8] == PNG
    assert main(["compare", "DSF-C11", "--db", db]) == 0
    assert "CHANGED" in capsys.readouterr().out


def _store_tables(db):
    store = open_store(db)
    try:
        table = run_points(store, 1)
        traces = {int(pid): point_trace(store, int(pid))[:2] for pid in table["point_id"]}
    finally:
        store.close()
    return table, traces


def _check_points(read: pd.DataFrame, table: pd.DataFrame):
    """Exported points against the store: every line power, setpoint and flag."""
    assert list(read["point_id"]) == list(table["point_id"])
    for col in ("power_a_dbm", "power_b_dbm", "spacing_ghz", "floor_dbm"):
        np.testing.assert_allclose(read[col].astype(float), table[col].astype(float))
    for key in ("tone_low_0", "sideband_high_1", "sideband_high_3"):
        np.testing.assert_allclose(read[f"{key}_dbm"].astype(float), table[key].astype(float))
        detected = read[f"{key}_detected"].astype(bool).to_numpy()
        np.testing.assert_array_equal(detected, table[key].notna().to_numpy())
        limits = read[f"{key}_upper_limit_dbm"].astype(float).to_numpy()
        assert np.all(np.isfinite(limits[~detected]))  # each undetected line has its limit
    np.testing.assert_array_equal(read["pol_angles_deg_2"].astype(float), 0.0)


def test_export_every_format_reads_back(db, capsys, tmp_path):
    table, traces = _store_tables(db)
    assert not table["sideband_high_3"].notna().all()  # some lines below the floor
    for fmt in ("csv", "parquet", "mat", "hdf5"):
        out = tmp_path / f"run1.{fmt}"
        assert main(["export", "1", "--format", fmt, "--out", str(out), "--db", db]) == 0
    _check_points(pd.read_csv(tmp_path / "run1.csv"), table)
    long = pd.read_csv(tmp_path / "run1.traces.csv")
    for pid, (x, y) in traces.items():
        part = long[long["point_id"] == pid]
        np.testing.assert_allclose(part["x_nm"], x)
        np.testing.assert_allclose(part["y_dbm"], y, atol=1e-9)
    pt = pq.read_table(tmp_path / "run1.parquet").to_pandas()
    _check_points(pt, table)
    for _, row in pt.iterrows():
        x, y = traces[int(row["point_id"])]
        np.testing.assert_array_equal(np.asarray(row["trace_y_dbm"]), y)
        np.testing.assert_array_equal(np.asarray(row["trace_x_nm"]), x)
    mat = scipy.io.loadmat(tmp_path / "run1.mat", squeeze_me=True)
    pts = mat["points"]
    mat_points = pd.DataFrame({name: np.atleast_1d(pts[name].item())
                               for name in pts.dtype.names})
    _check_points(mat_points, table)
    _check_traces(mat["trace_point_id"], mat["trace_x_nm"], mat["trace_y_dbm"], mat["trace_n"],
                  traces)
    with h5py.File(tmp_path / "run1.hdf5", "r") as f:
        h5_points = pd.DataFrame({name: f["points"][name][()] for name in f["points"]})
        _check_points(h5_points, table)
        _check_traces(f["traces/point_id"][()], f["traces/x_nm"][()], f["traces/y_dbm"][()],
                      f["traces/n"][()], traces)
    assert "--out" in _error_line(capsys, "export", "1", "--format", "csv", "--out",
                                  str(tmp_path / "no" / "x.csv"), "--db", db)
    assert "no run 5" in _error_line(capsys, "export", "5", "--format", "csv", "--out",
                                     str(tmp_path / "x.csv"), "--db", db)


def _check_traces(ids, xs, ys, ns, traces):
    assert len(ids) == len(traces)
    for pid, x_row, y_row, n in zip(ids, xs, ys, ns, strict=True):
        x, y = traces[int(pid)]
        assert int(n) == x.size
        np.testing.assert_array_equal(x_row[:int(n)], x)
        np.testing.assert_array_equal(y_row[:int(n)], y)
