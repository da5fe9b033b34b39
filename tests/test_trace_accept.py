"""Which traces the OSA adapter accepts (``OsaAdapter.accept``), on the virtual lab's si OSA
(levels in W): an integer axis in pm repeats values when samples lie closer than 1 pm, and a
linear trace's samples at or below 0 W read as FLOOR_DBM; neither is a corrupted trace.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from _engine_support import scenario

from labrun.bench import load_bench
from labrun.capture import check_trace
from labrun.errors import InstrumentError
from labrun.instruments import open_instrument
from labrun.resources import find_file
from labrun.vlab.lab import VirtualLab
from labrun.wireunits import FLOOR_DBM, from_wire

# INT,32 in pm, 0.2 nm span, 1001 samples: 0.2 pm apart, so each pm value repeats ~5 times
PM_AXIS_NM = np.round(np.linspace(1550.0e3, 1550.2e3, 1001)) / 1e3


@pytest.fixture
def osa(tmp_path):
    """The si OSA with level_range_dbm = [-120, 30] (a profile may narrow it)."""
    src = Path(find_file("si-osa.toml", "drivers")).read_text(encoding="utf-8")
    src = src.replace('name = "si-osa"', 'name = "narrow-osa"').replace(
        "[trace]\n", "[trace]\nlevel_range_dbm = [-120.0, 30.0]\n", 1)
    prof = tmp_path / "narrow-osa.toml"
    prof.write_text(src, encoding="utf-8")
    with VirtualLab(scenario(dialect="si")) as lab:
        bench = lab.write_bench(tmp_path / "bench.toml")
        text = bench.read_text(encoding="utf-8").replace('profile = "si-osa"',
                                                         f'profile = "{prof}"', 1)
        bench.write_text(text, encoding="utf-8")
        adapter = open_instrument(load_bench(bench), "osa")
        try:
            yield adapter
        finally:
            adapter.close()


def test_an_integer_pm_axis_with_repeats_is_accepted(osa):
    assert np.any(np.diff(PM_AXIS_NM) == 0)  # the case: repeated values
    y = np.full(PM_AXIS_NM.size, -60.0)
    osa.accept(PM_AXIS_NM, y)
    check_trace(PM_AXIS_NM, y, PM_AXIS_NM.size)  # the run's own check takes it too


@pytest.mark.parametrize("axis", [np.full(11, 1550.0), np.linspace(1551.0, 1550.0, 11),
                                  np.array([1550.0, 1550.2, 1550.1, 1550.3])],
                         ids=["flat", "falling", "one-step-back"])
def test_an_axis_that_does_not_rise_is_refused(osa, axis):
    y = np.full(axis.size, -60.0)
    with pytest.raises(InstrumentError, match="axis"):
        osa.accept(axis, y)
    with pytest.raises(InstrumentError, match="x is not"):
        check_trace(axis, y, axis.size)


def test_zero_watt_samples_of_a_linear_trace_pass_the_lower_bound(osa):
    """0 W and -1e-12 W (noise around zero) read as FLOOR_DBM (labrun.wireunits: the log of
    zero has no value): the narrowed lower bound -120 dBm does not refuse them, while a real
    sample at -150 dBm, and one above +30 dBm, still are."""
    watts = np.array([1e-6, 0.0, -1e-12, 1e-9])
    y = from_wire(watts, "dBm", "W")
    assert list(y[1:3]) == [FLOOR_DBM, FLOOR_DBM] and y[0] == pytest.approx(-30.0)
    x = np.linspace(1550.0, 1550.3, y.size)
    osa.accept(x, y)
    for bad in (-150.0, 31.0):
        with pytest.raises(InstrumentError, match="level_range_dbm"):
            osa.accept(x, np.append(y[:-1], bad))
