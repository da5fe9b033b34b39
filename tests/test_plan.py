"""Plan format: axis forms, ordering, keys, errors with field paths, ITU grid, automatic OSA."""

from __future__ import annotations

import hashlib
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.constants
import scipy.stats
from _plan_support import BASE_PLAN, make_bench, make_plan, write_plan

from labrun.errors import InputError
from labrun.lines import grid_ks
from labrun.plan import (
    GAUSS_DB,
    RBW_STEPS_NM,
    StopCondition,
    StopWatch,
    itu_grid_thz,
    load_plan,
    point_key,
    spacing_nm_to_ghz,
)

C = scipy.constants.c  # speed of light, exact (SI; scipy.constants as reference)

ZIP_POWERS = """
[axes.power_a_dbm]
values = [0.0, 1.0, 2.0]

[axes.power_b_dbm]
values = [0.0, 1.0, 2.0]

[order]
zip = [["power_a_dbm", "power_b_dbm"]]
"""


def _values(plan, name):
    """The setpoint values of ``name`` over the plan's regular points."""
    return [p.setpoint[name] for p in plan.points() if not p.is_reference]


# ----------------------------------------------------------------------------- axis forms


def test_axis_values_list(tmp_path):
    plan = make_plan(tmp_path, "power_b_dbm = 0.0\n" + """
[axes.power_a_dbm]
values = [-2.0, 0.5, 3.0]
""")
    assert _values(plan, "power_a_dbm") == [-2.0, 0.5, 3.0]
    assert _values(plan, "power_b_dbm") == [0.0, 0.0, 0.0]


def test_axis_start_stop_step_inclusive_and_clean(tmp_path):
    plan = make_plan(tmp_path, "power_b_dbm = 0.0\n" + """
[axes.power_a_dbm]
start = 0.0
stop = 1.0
step = 0.1
""")
    vals = _values(plan, "power_a_dbm")
    # numpy.linspace as the reference for the same 11 values, without float noise (0.3, not
    # 0.30000000000000004)
    assert vals == pytest.approx(list(np.linspace(0.0, 1.0, 11)), abs=1e-12)
    assert vals[3] == 0.3 and len(vals) == 11


def test_axis_descending_step(tmp_path):
    plan = make_plan(tmp_path, "power_b_dbm = 0.0\n" + """
[axes.power_a_dbm]
start = 6.0
stop = 0.0
step = -2.0
""")
    assert _values(plan, "power_a_dbm") == [6.0, 4.0, 2.0, 0.0]


def test_axis_linspace_and_logspace_match_numpy(tmp_path):
    text = BASE_PLAN.replace("spacing_ghz = 100.0\n", "") + """power_b_dbm = 0.0
laser_a_dbm = 5.0

[axes.spacing_ghz]
start = 25.0
stop = 400.0
num = 5
scale = "log"

[axes.attenuation_a_db]
start = 0.0
stop = 10.0
num = 3
"""
    plan = load_plan(write_plan(tmp_path, text))
    spacings = sorted(set(_values(plan, "spacing_ghz")))
    atts = sorted(set(_values(plan, "attenuation_a_db")))
    # numpy.geomspace / numpy.linspace as the reference
    assert spacings == pytest.approx(list(np.geomspace(25.0, 400.0, 5)), rel=1e-11)
    assert atts == pytest.approx(list(np.linspace(0.0, 10.0, 3)))
    assert len(plan.points()) == 15


def test_total_power_with_ratio(tmp_path):
    plan = make_plan(tmp_path, "ratio_db = 3.0\n" + """
[axes.total_power_dbm]
values = [0.0, 10.0]
""")
    for p in plan.points():
        pa, pb = p.setpoint["power_a_dbm"], p.setpoint["power_b_dbm"]
        assert pb - pa == pytest.approx(3.0)
    total_mw = [10 ** (p.setpoint["power_a_dbm"] / 10) + 10 ** (p.setpoint["power_b_dbm"] / 10)
                for p in plan.points()]
    # P[mW] = 10^(P[dBm]/10) (common practice): the two tones add up to the total
    assert total_mw == pytest.approx([1.0, 10.0])


def test_spacing_in_nm_is_exact_frequency_difference(tmp_path):
    head = BASE_PLAN.replace("spacing_ghz = 100.0\n", "")
    plan = make_plan(tmp_path, "power_a_dbm = 0.0\npower_b_dbm = 0.0\n" + """
[axes.spacing_nm]
values = [0.4, 0.8]
""", head=head)
    got = _values(plan, "spacing_ghz")
    # f = c / lambda with c from scipy.constants; tone b sits spacing_nm below tone a
    want = [(C / ((1550.0 - d) * 1e-9) - C / (1550.0e-9)) / 1e9 for d in (0.4, 0.8)]
    assert got == pytest.approx(want, rel=1e-9)
    assert spacing_nm_to_ghz(0.8, 1550.0) == pytest.approx(want[1], rel=1e-9)
    assert 99.0 < got[1] < 101.0


def test_pol_paddle_sweep_and_stokes_circle(tmp_path):
    plan = make_plan(tmp_path, "power_a_dbm = 0.0\npower_b_dbm = 0.0\n" + """
[axes.pol_angles_deg]
paddle = 2
base = [10.0, 0.0, 30.0]
start = 0.0
stop = 90.0
step = 45.0
""")
    assert _values(plan, "pol_angles_deg") == [(10.0, 0.0, 30.0), (10.0, 45.0, 30.0),
                                               (10.0, 90.0, 30.0)]
    plan = make_plan(tmp_path, "power_a_dbm = 0.0\npower_b_dbm = 0.0\n" + """
[axes.pol_stokes]
start = 0.0
stop = 180.0
step = 90.0
plane = "s1s3"
""", name="stokes.toml")
    got = _values(plan, "pol_stokes")
    assert np.allclose(got, [(1, 0, 0), (0, 0, 1), (-1, 0, 0)], atol=1e-12)
    assert all(math.isclose(np.linalg.norm(s), 1.0) for s in got)


def test_stokes_list_must_be_unit(tmp_path):
    with pytest.raises(InputError) as err:
        make_plan(tmp_path, "power_a_dbm = 0.0\npower_b_dbm = 0.0\n" + """
[axes.pol_stokes]
values = [[1.0, 0.0, 0.0], [0.5, 0.5, 0.0]]
""")
    assert "axes.pol_stokes.values[1]" in str(err.value)


# ----------------------------------------------------------------------------- ITU-T G.694.1 grid


def test_itu_grid_values():
    # ITU-T G.694.1: f = 193.1 THz + n x (grid spacing); anchor 193.1 THz
    assert itu_grid_thz(0, 50.0) == 193.1
    assert itu_grid_thz(1, 50.0) == pytest.approx(193.15, abs=1e-12)
    assert itu_grid_thz(-1, 100.0) == pytest.approx(193.0, abs=1e-12)
    assert itu_grid_thz(3, 12.5) == pytest.approx(193.1375, abs=1e-12)
    assert itu_grid_thz(-2, 25.0) == pytest.approx(193.05, abs=1e-12)
    with pytest.raises(ValueError):
        itu_grid_thz(1, 33.0)


def test_grid_channel_and_spacing_steps(tmp_path):
    head = """[plan]
name = "grid"
spool = "SMF-B02"

[fixed]
grid_ghz = 50.0
channel_a = 1
power_a_dbm = 0.0
power_b_dbm = 0.0
"""
    plan = make_plan(tmp_path, """
[axes.spacing_steps]
values = [1, 2, 4]
""", head=head)
    p0 = plan.points()[0].setpoint
    # ITU-T G.694.1: channel n=1 on the 50 GHz grid is 193.15 THz; lambda = c/f (scipy.constants.c)
    assert p0["wavelength_a_nm"] == pytest.approx(C / 193.15e12 * 1e9, rel=1e-10)
    assert _values(plan, "spacing_ghz") == [50.0, 100.0, 200.0]
    # tone b lands on the grid too: 193.15 THz + 2 x 50 GHz = 193.25 THz
    f_b = C / (plan.points()[1].setpoint["wavelength_b_nm"] * 1e-9) / 1e12
    assert f_b == pytest.approx(193.25, abs=1e-9)


def test_grid_needs_grid_ghz(tmp_path):
    head = BASE_PLAN.replace("spacing_ghz = 100.0\n", "")
    with pytest.raises(InputError) as err:
        make_plan(tmp_path, "power_a_dbm = 0.0\npower_b_dbm = 0.0\n[axes.spacing_steps]\n"
                  "values = [1, 2]\n", head=head)
    assert "fixed.grid_ghz" in str(err.value)


# ----------------------------------------------------------------------------- ordering


def test_nesting_outermost_first(tmp_path):
    body = """power_b_dbm = 0.0
[axes.power_a_dbm]
values = [0.0, 1.0]

[axes.pol_angles_deg]
values = [[0.0, 0.0, 0.0], [0.0, 90.0, 0.0], [0.0, 180.0, 0.0]]
"""
    plan = make_plan(tmp_path, body)
    assert _values(plan, "power_a_dbm") == [0.0] * 3 + [1.0] * 3
    plan = make_plan(tmp_path, body + '\n[order]\nnesting = ["pol_angles_deg", "power_a_dbm"]\n',
                     name="b.toml")
    assert _values(plan, "power_a_dbm") == [0.0, 1.0] * 3
    assert [a[1] for a in _values(plan, "pol_angles_deg")] == [0, 0, 90, 90, 180, 180]


def test_zipped_axes_advance_together(tmp_path):
    plan = make_plan(tmp_path, ZIP_POWERS)
    pairs = [(p.setpoint["power_a_dbm"], p.setpoint["power_b_dbm"]) for p in plan.points()]
    assert pairs == [(0.0, 0.0), (1.0, 1.0), (2.0, 2.0)]


def test_zipped_axes_need_equal_lengths(tmp_path):
    with pytest.raises(InputError) as err:
        make_plan(tmp_path, ZIP_POWERS.replace("values = [0.0, 1.0, 2.0]\n\n[axes.power_b",
                                               "values = [0.0, 1.0]\n\n[axes.power_b"))
    assert "order.zip[0]" in str(err.value) and "equal lengths" in str(err.value)


def test_snake_moves_one_level_at_a_time(tmp_path):
    head = """[plan]
name = "snake"
spool = "SMF-B02"

[fixed]
power_b_dbm = 0.0
"""
    plan = make_plan(tmp_path, """
[axes.wavelength_a_nm]
values = [1545.0, 1550.0, 1555.0]

[axes.spacing_ghz]
values = [25.0, 50.0]

[axes.power_a_dbm]
values = [0.0, 1.0, 2.0]

[order]
snake = true
""", head=head)
    axes = [("wavelength_a_nm", [1545.0, 1550.0, 1555.0]), ("spacing_ghz", [25.0, 50.0]),
            ("power_a_dbm", [0.0, 1.0, 2.0])]
    idx = [tuple(vals.index(p.setpoint[n]) for n, vals in axes) for p in plan.points()]
    assert len(set(idx)) == 18
    for before, after in zip(idx, idx[1:], strict=False):
        steps = [abs(a - b) for a, b in zip(before, after, strict=True)]
        assert sorted(steps) == [0, 0, 1]  # exactly one level moves, by one step
    assert _values(plan, "power_a_dbm")[:6] == [0.0, 1.0, 2.0, 2.0, 1.0, 0.0]


def test_repeats_sweep_and_point_modes(tmp_path):
    plan = make_plan(tmp_path, ZIP_POWERS + "repeats = 2\n")
    assert [(p.setpoint["power_a_dbm"], p.repeat) for p in plan.points()] == [
        (0.0, 0), (1.0, 0), (2.0, 0), (0.0, 1), (1.0, 1), (2.0, 1)]
    plan = make_plan(tmp_path, ZIP_POWERS + 'repeats = 2\nrepeat_mode = "point"\n', name="p.toml")
    assert [(p.setpoint["power_a_dbm"], p.repeat) for p in plan.points()] == [
        (0.0, 0), (0.0, 1), (1.0, 0), (1.0, 1), (2.0, 0), (2.0, 1)]
    assert len({p.key for p in plan.points()}) == 6


def test_seeded_random_order(tmp_path):
    body = """power_b_dbm = 0.0
[axes.power_a_dbm]
start = 0.0
stop = 9.0
step = 1.0

[order]
repeats = 2
"""
    plain = make_plan(tmp_path, body, name="plain.toml")
    a = make_plan(tmp_path, body + "shuffle_seed = 7\n", name="a.toml")
    b = make_plan(tmp_path, body + "shuffle_seed = 7\n", name="b.toml")
    c = make_plan(tmp_path, body + "shuffle_seed = 8\n", name="c.toml")
    keys = [[p.key for p in x.points()] for x in (plain, a, b, c)]
    assert keys[1] == keys[2]                         # same seed, same order
    assert keys[1] != keys[0] and keys[1] != keys[3]  # shuffled, and seed-dependent
    assert sorted(keys[1]) == sorted(keys[0]) == sorted(keys[3])
    assert [p.index for p in a.points()] == list(range(20))


def test_reference_points_interleaved(tmp_path):
    body = """power_b_dbm = 0.0
[axes.power_a_dbm]
start = 1.0
stop = 7.0
step = 1.0

[order]
reference_every = 3
reference = { power_a_dbm = 0.0 }
"""
    plan = make_plan(tmp_path, body)
    flags = [p.is_reference for p in plan.points()]
    assert flags == [True, False, False, False, True, False, False, False, True, False, True]
    refs = [p for p in plan.points() if p.is_reference]
    assert all(p.setpoint["power_a_dbm"] == 0.0 for p in refs)
    assert [p.repeat for p in refs] == [0, 1, 2, 3]
    assert len({p.key for p in plan.points()}) == len(plan.points())


def test_snake_and_shuffle_exclude(tmp_path):
    with pytest.raises(InputError) as err:
        make_plan(tmp_path, ZIP_POWERS + "snake = true\nshuffle_seed = 1\n")
    assert "order.snake" in str(err.value)


# ----------------------------------------------------------------------------- keys and hashes


def test_keys_from_values_and_stable_across_processes(tmp_path):
    path = write_plan(tmp_path, BASE_PLAN + ZIP_POWERS + "repeats = 2\nreference_every = 2\n")
    keys = [p.key for p in load_plan(path).points()]
    assert keys == [p.key for p in load_plan(path).points()]
    assert keys[1] == "pt|wavelength_a_nm=1550|spacing_ghz=100|power_a_dbm=0|power_b_dbm=0|r0"
    assert keys[0].startswith("ref|") and keys[0].endswith("|r0")
    code = ("import sys; from labrun.plan import load_plan; "
            "print('\\n'.join(p.key for p in load_plan(sys.argv[1]).points()))")
    env = dict(os.environ, PYTHONHASHSEED="12345")
    out = subprocess.run([sys.executable, "-c", code, str(path)], capture_output=True, text=True,
                         env=env, check=True)
    assert out.stdout.split() == keys


def test_key_ignores_note_but_hash_does_not(tmp_path):
    a = make_plan(tmp_path, ZIP_POWERS, name="a.toml")
    b = make_plan(tmp_path, ZIP_POWERS, head=BASE_PLAN.replace('spool = "HNLF-A17"',
                  'spool = "HNLF-A17"\nnote = "second night"'), name="b.toml")
    assert [p.key for p in a.points()] == [p.key for p in b.points()]
    assert a.sha256 != b.sha256


def test_text_and_sha256_of_exact_bytes(tmp_path):
    raw = (BASE_PLAN + ZIP_POWERS).encode("utf-8")
    path = tmp_path / "exact.toml"
    path.write_bytes(raw)
    plan = load_plan(path)
    assert plan.sha256 == hashlib.sha256(raw).hexdigest()  # hashlib as the reference
    assert plan.text.encode("utf-8") == raw
    assert (plan.name, plan.spool) == ("test sweep", "HNLF-A17")


def test_point_key_tolerates_float_noise():
    a = point_key({"power_a_dbm": 0.1 + 0.2, "spacing_ghz": 100.0}, 0, False)
    b = point_key({"power_a_dbm": 0.3, "spacing_ghz": 100.0}, 0, False)
    assert a == b
    assert point_key({"power_a_dbm": 0.3}, 1, False) != point_key({"power_a_dbm": 0.3}, 0, False)
    assert point_key({"power_a_dbm": 0.3}, 0, True) != point_key({"power_a_dbm": 0.3}, 0, False)


# ----------------------------------------------------------------------------- errors


BAD = [
    ("[axes.power_a_dbm]\nstart = 0.0\nstep = 1.0\n", "axes.power_a_dbm.stop"),
    ("[axes.power_a_dbm]\nstart = 0.0\nstop = 5.0\nstep = -1.0\n", "axes.power_a_dbm.step"),
    ("[axes.power_a_dbm]\nvalues = [0.0, 1.0]\nstpe = 1.0\n", "axes.power_a_dbm.stpe"),
    ("[axes.power_a_dbm]\nvalues = [0.0, 99.0]\n", "axes.power_a_dbm.values[1]"),
    ("[axes.power_a_dbm]\nvalues = [0.0, 0.0]\n", "axes.power_a_dbm.values[1]"),
    ("[axes.power_a_dbm]\nvalues = [0.0, \"x\"]\n", "axes.power_a_dbm.values[1]"),
    ("[axes.power_a_dbm]\nstart = 0.0\nstop = 5.0\nnum = 0\n", "axes.power_a_dbm.num"),
    ("[axes.power_a_dbm]\nstart = -1.0\nstop = 5.0\nnum = 3\nscale = \"log\"\n",
     "axes.power_a_dbm.start"),
    ("[axes.power_c_dbm]\nvalues = [0.0]\n", "axes.power_c_dbm"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[order]\nnesting = [\"spacing\"]\n", "order.nesting[0]"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[[stop]]\nwhen = \"sideband_above\"\n", "stop[0].dbm"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[osa]\nrbw_nm = -0.1\n", "osa.rbw_nm"),
    # issue 13: NaN, infinity and booleans refused; ranges bounded before any allocation
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[[stop]]\nwhen = \"sideband_above\"\ndbm = nan\n",
     "stop[0].dbm"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[[stop]]\nwhen = \"line_above\"\ndbm = inf\n",
     "stop[0].dbm"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[[stop]]\nwhen = \"line_above\"\ndbm = 1e308\n",
     "stop[0].dbm"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[[stop]]\nwhen = \"tone_snr_below\"\ndb = nan\n",
     "stop[0].db"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[[stop]]\nwhen = \"line_above\"\ndbm = 5.0\n"
     "consecutive = true\n", "stop[0].consecutive"),
    ("[axes.power_a_dbm]\nstart = 0.0\nstop = 5.0\nnum = 1000000000\n", "axes.power_a_dbm.num"),
    ("[axes.power_a_dbm]\nstart = 0.0\nstop = 5.0\nnum = true\n", "axes.power_a_dbm.num"),
    ("[axes.power_a_dbm]\nstart = 0.0\nstop = inf\nnum = 3\n", "axes.power_a_dbm.stop"),
    ("[axes.power_a_dbm]\nstart = -1e308\nstop = 1e308\nstep = 1e-300\n",
     "axes.power_a_dbm.step"),
    ("[axes.power_a_dbm]\nstart = 0.0\nstop = 5.0\nstep = 1e-9\n", "axes.power_a_dbm.step"),
    ("[axes.power_a_dbm]\nvalues = [0.0, nan]\n", "axes.power_a_dbm.values[1]"),
    ("[axes.power_a_dbm]\nvalues = [0.0, true]\n", "axes.power_a_dbm.values[1]"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\nsettle_s = nan\n", "axes.power_a_dbm.settle_s"),
    ("[axes.pol_angles_deg]\npaddle = 1\nstart = 0.0\nstop = 90.0\nnum = 3\n"
     "base = [0.0, true, 0.0]\n[axes.power_a_dbm]\nvalues = [0.0]\n",
     "axes.pol_angles_deg.base[1]"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[osa]\ncenter_nm = inf\n", "osa.center_nm"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[osa]\nspan_nm = nan\n", "osa.span_nm"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[osa]\nspan_nm = 1e308\n", "osa.span_nm"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[osa]\nrbw_nm = 1e-320\nspan_nm = 1.0\n",
     "osa.rbw_nm"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[osa]\npoints = 1000000000\n", "osa.points"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[osa]\nskirt_db = 0.0\n", "osa.skirt_db"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[osa]\nsweep_s = inf\n", "osa.sweep_s"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[osa]\ncapture_input = 1\n", "osa.capture_input"),
    ("[axes.power_a_dbm]\nvalues = [0.0]\n[order]\nrepeats = true\n", "order.repeats"),
]


@pytest.mark.parametrize(("body", "field"), BAD)
def test_bad_fields_name_file_and_path(tmp_path, body, field):
    path = write_plan(tmp_path, BASE_PLAN + "power_b_dbm = 0.0\n" + body, "bad-plan.toml")
    with pytest.raises(InputError) as err:
        load_plan(path)
    msg = str(err.value)
    assert err.value.field == field
    assert msg.startswith(f"{path}: {field}: ") and len(msg.splitlines()) == 1
    assert err.value.exit_code == 2


def test_missing_metadata_and_duplicate_setting(tmp_path):
    with pytest.raises(InputError) as err:
        load_plan(write_plan(tmp_path, BASE_PLAN.replace('name = "test sweep"\n', "")
                             + ZIP_POWERS))
    assert err.value.field == "plan.name"
    with pytest.raises(InputError) as err:
        make_plan(tmp_path, "power_a_dbm = 1.0\n" + ZIP_POWERS)
    assert err.value.field == "axes.power_a_dbm"
    with pytest.raises(InputError) as err:
        make_plan(tmp_path, "power_b_dbm = 1.0\n[axes.power_a_dbm]\nvalues = [0.0]\n"
                  "[axes.total_power_dbm]\nvalues=[1.0]\n", head=BASE_PLAN + "ratio_db = 0.0\n")
    assert "power of tone" in str(err.value)


def test_lines_outside_the_optical_range_are_refused(tmp_path):
    """3 orders of 19 THz below tone a at 1550 nm (193.4 THz) fall at 136.4 THz = 2198 nm, inside
    600-2500 nm; the high side 193.4 + 4 x 19 = 269.4 THz = 1113 nm too: accepted. 5 orders reach
    98.4 THz = 3047 nm: refused (c = 299792.458 nm THz, SI)."""
    head = BASE_PLAN.replace("spacing_ghz = 100.0\n", "")
    body = "power_b_dbm = 0.0\n[axes.spacing_ghz]\nvalues = [19000.0]\n[axes.power_a_dbm]\n" \
           "values = [0.0]\n"
    assert make_plan(tmp_path, body, head=head).points()
    with pytest.raises(InputError, match="outside 600-2500 nm") as err:
        make_plan(tmp_path, body, head=head.replace('spool = "HNLF-A17"\n',
                                                    'spool = "HNLF-A17"\norders = 5\n'))
    assert err.value.field == "axes"


def test_channel_beyond_zero_frequency_is_refused(tmp_path):
    """Channel -2000 on the 100 GHz grid is 193.1 - 200 THz < 0 (ITU-T G.694.1 formula)."""
    head = BASE_PLAN.replace("wavelength_a_nm = 1550.0\n", "grid_ghz = 100.0\n")
    with pytest.raises(InputError, match="outside 600-2500 nm"):
        make_plan(tmp_path, "power_b_dbm = 0.0\n[axes.channel_a]\nvalues = [-2000]\n"
                  "[axes.power_a_dbm]\nvalues = [0.0]\n", head=head)


def test_axis_count_is_bounded_before_anything_is_computed(tmp_path):
    """num = 1e9 once allocated 7.45 GiB before the 10,000-value check: now the file model
    refuses it (pydantic's bound) before any array exists."""
    import tracemalloc

    tracemalloc.start()
    with pytest.raises(InputError, match="less than or equal to 10000") as err:
        make_plan(tmp_path, "power_b_dbm = 0.0\n[axes.power_a_dbm]\nstart = 0.0\nstop = 5.0\n"
                  "num = 1000000000\n")
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert err.value.field == "axes.power_a_dbm.num" and peak < 50e6


def test_non_utf8_plan_is_one_line(tmp_path):
    path = tmp_path / "latin1.toml"
    path.write_bytes((BASE_PLAN + "power_b_dbm = 0.0\n[axes.power_a_dbm]\nvalues = [0.0]\n")
                     .replace("test sweep", "s\u00e9rie").encode("latin-1"))
    with pytest.raises(InputError, match="not UTF-8") as err:
        load_plan(path)
    assert str(path) in str(err.value) and len(str(err.value).splitlines()) == 1


def test_bad_toml_names_file(tmp_path):
    path = write_plan(tmp_path, "[plan\nname = 1\n", "broken.toml")
    with pytest.raises(InputError) as err:
        load_plan(path)
    assert str(path) in str(err.value) and "TOML" in str(err.value)


# ----------------------------------------------------------------------------- OSA settings


def _line_nm(setpoint, orders):
    """Wavelengths of every grid line (labrun.lines indexing), via c from scipy.constants."""
    f_a = C / (setpoint["wavelength_a_nm"] * 1e-9)
    d = setpoint["spacing_ghz"] * 1e9
    return [C / (f_a + k * d) * 1e9 for k in grid_ks(orders)]


def test_osa_auto_covers_orders_and_resolves_lines(tmp_path):
    plan = make_plan(tmp_path, ZIP_POWERS.replace("[order]", "[osa]\n[order]"),
                     head=BASE_PLAN.replace('spool = "HNLF-A17"', 'spool = "HNLF-A17"\norders = 3'))
    osa = plan.osa_settings()
    lines = _line_nm(plan.points()[0].setpoint, 3)
    lo, hi = osa.center_nm - osa.span_nm / 2, osa.center_nm + osa.span_nm / 2
    assert lo + 0.5 <= min(lines) and max(lines) <= hi - 0.5     # every order, with margin
    spacing_nm = lines[0] - lines[1]  # neighbouring lines, nm
    assert osa.rbw_nm <= spacing_nm / 4 and osa.rbw_nm in RBW_STEPS_NM
    assert (osa.points - 1) * osa.rbw_nm / osa.span_nm >= 5
    assert "RBW" in osa.reason and "span" in osa.reason and not osa.warnings


def test_osa_gaussian_skirt_constant_matches_scipy():
    # scipy.stats.norm as the reference: a Gaussian with FWHM w = 2 sqrt(2 ln 2) sigma is
    # 10 log10(e) 4 ln 2 (d/w)^2 dB down at offset d.
    w = 0.1
    sigma = w / (2 * math.sqrt(2 * math.log(2)))
    for d in (0.05, 0.2, 0.4):
        ratio = scipy.stats.norm.pdf(d, scale=sigma) / scipy.stats.norm.pdf(0, scale=sigma)
        drop = 10 * math.log10(ratio)
        assert drop == pytest.approx(-GAUSS_DB * (d / w) ** 2, rel=1e-9)


def test_osa_follows_pump_and_respects_profile(tmp_path):
    head = BASE_PLAN.replace("wavelength_a_nm = 1550.0\n", "")
    plan = make_plan(tmp_path, """power_a_dbm = 0.0
power_b_dbm = 0.0
[axes.wavelength_a_nm]
values = [1540.0, 1560.0]
""", head=head)
    osa = plan.osa_settings()
    assert osa.per_point_center
    centers = [osa.for_point(p.setpoint).center_nm for p in plan.points()]
    assert centers[1] - centers[0] == pytest.approx(20.0, abs=0.05)
    for p in plan.points():
        lines = _line_nm(p.setpoint, plan.orders)
        c = osa.for_point(p.setpoint).center_nm
        assert c - osa.span_nm / 2 < min(lines) and max(lines) < c + osa.span_nm / 2


def test_osa_explicit_values_and_warnings(tmp_path):
    plan = make_plan(tmp_path, ZIP_POWERS + "[osa]\nrbw_nm = 0.5\nspan_nm = 2.0\npoints = 129\n")
    osa = plan.osa_settings()
    assert (osa.rbw_nm, osa.span_nm, osa.points) == (0.5, 2.0, 129)
    text = " ".join(osa.warnings)
    assert "spacing/4" in text and "does not cover" in text
    assert "as given" in osa.reason


def test_osa_uses_bench_profile_limits(tmp_path):
    bench = make_bench(tmp_path)
    # 12.5 GHz (~0.100 nm): spacing/4 = 0.025 nm, the 60 dB Gaussian skirt rule 0.0224 nm,
    # so 0.02 nm; the generic OSA profile allows it
    plan = make_plan(tmp_path, ZIP_POWERS, head=BASE_PLAN.replace("100.0", "12.5"))
    osa = plan.osa_settings(bench)
    assert osa.rbw_nm == 0.02 and not osa.warnings
    # 5 GHz (~0.04 nm) would need 0.01 nm or finer with margin: the profile cannot go below 0.01
    plan = make_plan(tmp_path, ZIP_POWERS, head=BASE_PLAN.replace("100.0", "5.0"), name="n.toml")
    osa = plan.osa_settings(bench)
    assert osa.rbw_nm == 0.01 and any("finest RBW" in w for w in osa.warnings)


# ----------------------------------------------------------------------------- stop conditions


def _lines(sideband_dbm, tone_snr):
    return [
        {"kind": "tone", "side": "low", "order": 0, "power_dbm": 0.0, "snr_db": tone_snr,
         "detected": True},
        {"kind": "tone", "side": "high", "order": 0, "power_dbm": 0.0, "snr_db": 40.0,
         "detected": True},
        {"kind": "sideband", "side": "high", "order": 1, "power_dbm": sideband_dbm,
         "snr_db": 10.0, "detected": True},
        {"kind": "sideband", "side": "low", "order": 2, "power_dbm": None, "snr_db": None,
         "detected": False},
    ]


def test_stop_conditions(tmp_path):
    plan = make_plan(tmp_path, ZIP_POWERS + """
[[stop]]
when = "sideband_above"
dbm = -20.0
side = "high"

[[stop]]
when = "tone_snr_below"
db = 20.0
tone = "a"
consecutive = 2
""")
    watch = StopWatch(plan.stop_conditions)
    assert watch.update(_lines(-30.0, 30.0)) is None
    assert "high 1" in watch.update(_lines(-10.0, 30.0))
    watch = StopWatch(plan.stop_conditions)
    assert watch.update(_lines(-30.0, 10.0)) is None            # first low-SNR point
    assert "tone a SNR" in watch.update(_lines(-30.0, 10.0))    # second in a row
    cond = StopCondition("line_above", 5.0)
    assert cond.reason(_lines(6.0, 30.0)) is not None and cond.reason(_lines(4.0, 30.0)) is None


def test_shipped_sweeps_load(tmp_path):
    repo = Path(__file__).resolve().parents[1] / "sweeps"
    for name in ("power-sweep.toml", "spacing-sweep.toml", "polarisation-sweep.toml"):
        plan = load_plan(repo / name)
        assert plan.points() and plan.spool in ("HNLF-A17", "SMF-B02")
    assert len(load_plan(repo / "power-sweep.toml").points()) <= 50
