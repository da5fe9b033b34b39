"""``labrun replay --twin`` models the spool from the fit ``labrun spools`` headlines
(``compare.headline_fit``: newest fit whose gamma claims a U with a measured D, else newest with
a U, else newest), says which fit and why, and warns when no fit claims a U. A newer power-only
fit without D (gamma far low, claiming no U) must not become the twin. Fit values are invented
(realistic for a highly nonlinear fibre); the rule is labrun's own (docs/design.md)."""

from __future__ import annotations

from types import SimpleNamespace

from labrun.cli.replay import model_text
from labrun.replay import twin_spool
from labrun.spoolfits import GIVEN_SOURCE, FitRecord, ParameterRecord, store_fit
from labrun.store import open_store

LABEL = "HNLF-T31"


def _gamma(value: float, u95: float | None, extra: dict) -> ParameterRecord:
    return ParameterRecord(value=value, stderr=None if u95 is None else u95 / 2, u95=u95,
                           unit="1/(W km)", model="test", n_points=25, residual_rms=0.0,
                           extra=extra)


PARAMS = {
    "joint": {"gamma": _gamma(10.9, 0.09, {"u_combined": 0.045}),
              "dispersion": ParameterRecord(-0.31, 0.002, 0.004, "ps/(nm km)", "test", 30, 0.0,
                                            {"u_combined": 0.002, "sign_determined": True})},
    "given": {"gamma": _gamma(10.7, 0.4, {"u_combined": 0.2, "dispersion_source": GIVEN_SOURCE,
                                          "dispersion_used_ps_per_nm_km": -0.3,
                                          "dispersion_used_u_ps_per_nm_km": 0.1})},
    "no_u": {"gamma": _gamma(4.6, None, {"no_u_reason": "dispersion unknown: no spacing run"})},
    "no_u_later": {"gamma": _gamma(4.9, None,
                                   {"no_u_reason": "dispersion unknown: no spacing run"})},
}


def _twin(tmp_path, kinds):
    """Store fits of LABEL of ``kinds`` (oldest first); the twin of a run on LABEL, fit ids."""
    store = open_store(str(tmp_path / "t.db"))
    try:
        spool_id = store.spool_id(LABEL, length_km=1.0, loss_db_per_km=0.9)
        ids = [store_fit(store, spool_id, FitRecord(
            spool=LABEL, run_ids=[1], parameters=PARAMS[k],
            spool_snapshot={"length_km": 1.0, "loss_db_per_km": 0.9})) for k in kinds]
        return twin_spool(store, SimpleNamespace(id=1, spool_id=spool_id)), ids
    finally:
        store.close()


def test_a_newer_fit_without_u_does_not_become_the_twin(tmp_path):
    twin, ids = _twin(tmp_path, ["joint", "given", "no_u"])
    assert twin.spec.gamma_per_w_per_km == 10.9  # the joint fit's, not the newest 4.6
    assert twin.spec.dispersion_ps_per_nm_km == -0.31
    assert f"fit {ids[0]} of {LABEL}" in twin.source and f"fit {ids[0]} of {LABEL}" in twin.why
    assert "D was measured" in twin.why
    assert f"newer fit {ids[1]} not used (with a given D" in twin.why
    assert f"newer fit {ids[2]} not used (without U)" in twin.why
    assert twin.warnings == []


def test_a_fit_with_a_given_d_outranks_a_newer_one_without_u(tmp_path):
    twin, ids = _twin(tmp_path, ["given", "no_u"])
    assert twin.spec.gamma_per_w_per_km == 10.7 and twin.spec.dispersion_ps_per_nm_km == -0.3
    assert f"fit {ids[0]}" in twin.why and "D given on the spool record" in twin.why
    assert twin.warnings == []


def test_no_fit_with_u_uses_the_newest_and_warns(tmp_path):
    twin, ids = _twin(tmp_path, ["no_u", "no_u_later"])
    assert f"fit {ids[1]} of {LABEL}" in twin.source  # the newest
    assert twin.spec.gamma_per_w_per_km == 4.9  # its value, not the older fit's 4.6
    (warning,) = twin.warnings
    assert "not trustworthy" in warning and "dispersion unknown" in warning
    assert "no fit of the spool claims a U" in twin.why


def test_the_text_output_names_the_fit_and_warns():
    out = {"run_id": 2, "replay_of": 1, "status": "completed", "points_compared": 0,
           "model": "twin: fit 3 of X", "model_why": "fit 3 of X: why", "warnings": ["w1"],
           "residual_db": {}, "residual_by_order": {}, "per_point": [], "verdict": "v",
           "reason": "r"}
    text = model_text(out)
    assert "  fit used: fit 3 of X: why" in text and "  WARNING: w1" in text
