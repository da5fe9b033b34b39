"""Profile loading: shipped profiles are valid; every kind of mistake names file and field."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from labrun.errors import InputError
from labrun.profiles import KIND_OPERATIONS, load_profile
from labrun.resources import data_dir

SHIPPED = sorted(data_dir("drivers").glob("*.toml"))

LASER = (data_dir("drivers") / "generic-laser.toml").read_text()


def test_every_kind_has_a_shipped_profile():
    kinds = {load_profile(p).kind for p in SHIPPED}
    assert kinds == set(KIND_OPERATIONS)


@pytest.mark.parametrize("path", SHIPPED, ids=lambda p: p.stem)
def test_shipped_profile_loads_and_renders(path):
    profile = load_profile(path)
    assert profile.name == path.stem
    assert profile.operations["identify"].query == "*IDN?"  # IEEE 488.2 common query
    for op in profile.operations.values():
        if op.command and "value" in op.placeholders:
            lo, hi = op.range
            sample = int(lo) if op.integer else lo
            extra = {"index": op.index_range[0]} if op.index_range else {}
            wire = op.to_wire(sample)  # the instrument's unit (drivers/si-laser.toml: m, W)
            text = op.render(value=wire, **extra)
            assert "{" not in text
            assert float(text.split()[-1]) == pytest.approx(float(wire), rel=1e-6)


def test_load_by_name_and_fields():
    laser = load_profile("generic-laser")
    op = laser.operations["set_power_dbm"]
    assert op.range == (-10.0, 13.0) and op.readback == "read_power_dbm"
    assert op.render(value=3.14159) == "SOUR:POW 3.142"
    assert laser.capabilities.interlock and laser.capabilities.output_state
    assert laser.error_query == "SYST:ERR?" and laser.init == ("*CLS",)
    osa = load_profile("generic-osa")
    assert osa.trace.format == "real32" and osa.trace.byte_order == "little"
    assert load_profile("generic-osa-ascii").trace.format == "ascii"
    assert osa.operations["set_points"].integer


def _write(tmp_path: Path, text: str, name: str = "my-laser") -> Path:
    path = tmp_path / f"{name}.toml"
    path.write_text(text.replace('name = "generic-laser"', f'name = "{name}"'))
    return path


BAD_CASES = [
    # (description, edit of the generic laser profile, field expected in the message)
    ("unknown operation", lambda t: t + '\n[operations.set_frequency_thz]\n'
                                        'command = "SOUR:FREQ {value}"\nrange = [1.0, 2.0]\n',
     "operations.set_frequency_thz"),
    ("missing placeholder", lambda t: t.replace('SOUR:POW {value:.3f}', 'SOUR:POW 1'),
     "operations.set_power_dbm"),
    ("unknown placeholder", lambda t: t.replace('SOUR:POW {value:.3f}', 'SOUR:POW {val:.3f}'),
     "operations.set_power_dbm"),
    ("index without index_range", lambda t: t.replace('SOUR:WAV?', 'SOUR{index}:WAV?'),
     "operations.read_wavelength_nm"),
    ("bad range order", lambda t: t.replace('range = [-10.0, 13.0]', 'range = [13.0, -10.0]'),
     "operations.set_power_dbm.range"),
    ("range not numbers", lambda t: t.replace('range = [-10.0, 13.0]', 'range = ["a", "b"]'),
     "operations.set_power_dbm.range"),
    ("missing kind", lambda t: t.replace('kind = "laser"\n', ''), "profile.kind"),
    ("unknown kind", lambda t: t.replace('kind = "laser"', 'kind = "maser"'), "profile.kind"),
    ("unknown field", lambda t: t.replace('unit = "dBm"', 'units = "dBm"', 1), "units"),
    ("readback to nowhere", lambda t: t.replace('readback = "read_power_dbm"',
                                                'readback = "read_pwr"'),
     "operations.set_power_dbm.readback"),
    ("query without parse", lambda t: t.replace('parse = "float"\nunit = "dBm"',
                                                'unit = "dBm"'),
     "operations.read_power_dbm"),
    ("both command and query", lambda t: t.replace('command = "OUTP:STAT OFF"',
                                                   'command = "OUTP:STAT OFF"\nquery = "X?"'),
     "operations.output_off"),
    ("missing safe-off operation", lambda t: re.sub(
        r'\[operations\.output_off\]\ncommand = "OUTP:STAT OFF"\nreadback = "read_output_state"\n',
        "", t), "operations.output_off"),
    ("bad parse", lambda t: t.replace('parse = "bool"', 'parse = "boolean"', 1), "parse"),
]


def _sub(old: str, new: str, count: int = 1):
    """An edit of the shipped laser profile (asserting the text to edit is there)."""
    def edit(text: str) -> str:
        assert old in text, old
        return text.replace(old, new, count)
    return edit


# issue 13: every template holds one command (IEEE 488.2 7.4.1: ';' separates program message
# units; a line end terminates the message), plain format specs, init never switches light on,
# numbers finite and within range, booleans not numbers.
ONE_COMMAND_CASES = [
    ("second command after output_off", _sub('"OUTP:STAT OFF"', '"OUTP:STAT OFF;:OUTP:STAT ON"'),
     "operations.output_off"),
    ("second command after the power", _sub('"SOUR:POW {value:.3f}"',
                                           '"SOUR:POW {value:.3f};:SOUR:POW 13"'),
     "operations.set_power_dbm"),
    ("newline inside a template", _sub('"SOUR:POW?"', '"SOUR:POW?\\nOUTP:STAT ON"'),
     "operations.read_power_dbm"),
    ("carriage return inside a template", _sub('"OUTP:STAT OFF"', '"OUTP:STAT OFF\\rOUTP ON"'),
     "operations.output_off"),
    ("command inside the write termination", _sub('write_termination = "\\n"',
                                                 'write_termination = ";:OUTP:STAT ON\\n"'),
     "profile.write_termination"),
    ("odd read termination", _sub('read_termination = "\\n"', 'read_termination = "X"'),
     "profile.read_termination"),
    ("second command in the error query", _sub('error_query = "SYST:ERR?"',
                                               'error_query = "SYST:ERR?;:OUTP ON"'),
     "profile.error_query"),
    ("second command in init", _sub('init = ["*CLS"]', 'init = ["*CLS;:OUTP:STAT ON"]'),
     "profile.init[0]"),
    ("init switches on (OUTP:STAT ON)", _sub('init = ["*CLS"]', 'init = ["*CLS", "OUTP:STAT ON"]'),
     "profile.init[1]"),
    ("init switches on (OUTP ON)", _sub('init = ["*CLS"]', 'init = ["outp on"]'),
     "profile.init[0]"),
    ("init switches on (SOUR:POW:STAT ON)", _sub('init = ["*CLS"]', 'init = [":SOUR:POW:STAT 1"]'),
     "profile.init[0]"),
    ("init switches on (long form)", _sub('init = ["*CLS"]', 'init = ["OUTPUT2:STATE ON"]'),
     "profile.init[0]"),
    ("wide format spec", _sub("{value:.3f}", "{value:>99999999999}"), "operations.set_power_dbm"),
    ("width in a format spec", _sub("{value:.3f}", "{value:20.3f}"), "operations.set_power_dbm"),
    ("nested format spec", _sub("{value:.3f}", "{value:.{value}f}"), "operations.set_power_dbm"),
    ("conversion in a placeholder", _sub("{value:.3f}", "{value!r}"), "operations.set_power_dbm"),
    ("tolerance nan", _sub("tolerance = 0.05", "tolerance = nan"),
     "operations.set_power_dbm.tolerance"),
    ("tolerance inf", _sub("tolerance = 0.05", "tolerance = inf"),
     "operations.set_power_dbm.tolerance"),
    ("tolerance negative", _sub("tolerance = 0.05", "tolerance = -1"),
     "operations.set_power_dbm.tolerance"),
    ("tolerance wider than a tenth of the range", _sub("tolerance = 0.05", "tolerance = 2.5"),
     "operations.set_power_dbm.tolerance"),
    ("tolerance below the printed step", _sub("tolerance = 0.05", "tolerance = 0.0004"),
     "operations.set_power_dbm.tolerance"),
    ("tolerance a boolean", _sub("tolerance = 0.05", "tolerance = true"),
     "operations.set_power_dbm.tolerance"),
    ("range with infinity", _sub("range = [-10.0, 13.0]", "range = [-10.0, inf]"),
     "operations.set_power_dbm.range"),
    ("range of booleans", _sub("range = [-10.0, 13.0]", "range = [false, true]"),
     "operations.set_power_dbm.range"),
    ("settle_s nan", _sub("settle_s = 0.2", "settle_s = nan"), "operations.set_power_dbm.settle_s"),
    ("settle_s a day", _sub("settle_s = 0.2", "settle_s = 86400.0"),
     "operations.set_power_dbm.settle_s"),
    ("timeout a boolean", _sub("timeout_ms = 3000", "timeout_ms = true"), "profile.timeout_ms"),
    ("timeout of years", _sub("timeout_ms = 3000", "timeout_ms = 100000000000"),
     "profile.timeout_ms"),
    ("placeholder in the error query", _sub('error_query = "SYST:ERR?"',
                                            'error_query = "SYST:ERR? {value:020.3f}"'),
     "profile.error_query"),
    ("placeholder in init", _sub('init = ["*CLS"]', 'init = ["*CLS {value}"]'),
     "profile.init[0]"),
    ("capability a number", _sub("output_state = true", "output_state = 1"),
     "capabilities.output_state"),
]


@pytest.mark.parametrize("case", ONE_COMMAND_CASES, ids=[c[0] for c in ONE_COMMAND_CASES])
def test_templates_hold_one_command_and_plain_numbers(tmp_path, case):
    _, edit, field = case
    path = _write(tmp_path, edit(LASER))
    with pytest.raises(InputError) as info:
        load_profile(path)
    message = str(info.value)
    assert "\n" not in message and str(path) in message and field in message, message


def test_plain_specs_and_dark_init_are_accepted(tmp_path):
    """The rules refuse only what they name: precision/type specs, OUTP:STAT OFF and a query of
    the state in init, and ';' inside a quoted description stay valid."""
    text = (LASER.replace("{value:.3f}", "{value:.6e}")
            .replace('init = ["*CLS"]', 'init = ["*CLS", "OUTP:STAT OFF", "OUTP:STAT?", '
                                        '"SOUR:POW:STAT 0"]')
            .replace('description = "', 'description = "a; b '))
    profile = load_profile(_write(tmp_path, text))
    assert profile.operations["set_power_dbm"].render(value=1.5) == "SOUR:POW 1.500000e+00"
    assert profile.init == ("*CLS", "OUTP:STAT OFF", "OUTP:STAT?", "SOUR:POW:STAT 0")


@pytest.mark.parametrize("case", BAD_CASES, ids=[c[0] for c in BAD_CASES])
def test_bad_profile_names_file_and_field(tmp_path, case):
    _, edit, field = case
    edited = edit(LASER)
    assert edited != LASER
    path = _write(tmp_path, edited)
    with pytest.raises(InputError) as info:
        load_profile(path)
    message = str(info.value)
    assert "\n" not in message
    assert str(path) in message and field in message, message
    assert info.value.file == str(path)


def test_name_must_match_file(tmp_path):
    path = tmp_path / "other.toml"
    path.write_text(LASER)
    with pytest.raises(InputError, match="profile.name"):
        load_profile(path)


def test_bad_toml_and_missing_file(tmp_path):
    path = tmp_path / "broken.toml"
    path.write_text("[profile\nname = 1")
    with pytest.raises(InputError, match="not valid TOML"):
        load_profile(path)
    with pytest.raises(InputError, match="no profile"):
        load_profile(tmp_path / "absent.toml")


def test_osa_needs_trace_table(tmp_path):
    text = (data_dir("drivers") / "generic-osa.toml").read_text()
    text = re.sub(r"\[trace\][^\[]*", "", text).replace('name = "generic-osa"',
                                                        'name = "no-trace"')
    path = tmp_path / "no-trace.toml"
    path.write_text(text)
    with pytest.raises(InputError, match="trace"):
        load_profile(path)


SAFE_OFF_INIT_REFUSED = [
    # (what, the safe_off_init entry): each could change the instrument before its switch-off
    ("reset", "*RST"),
    ("recall", "*RCL 1"),
    ("query", "SYST:ERR?"),
    ("a setting operation's command", "SOUR:POW 13.000"),
    ("the same setting, long form with suffix", ":sour1:pow 1"),
    ("switches on", "OUTP:STAT ON"),
    ("two commands", "*CLS;:SOUR:POW 1"),
]


@pytest.mark.parametrize("case", SAFE_OFF_INIT_REFUSED, ids=[c[0] for c in SAFE_OFF_INIT_REFUSED])
def test_safe_off_init_refuses_anything_that_sets(tmp_path, case):
    """safe_off_init is all a safe-off connection sends before switching off: loading refuses
    a reset, a recall, a query, a setting of the profile's own operations and a switch-on,
    naming file and field."""
    _, command = case
    text = LASER.replace('init = ["*CLS"]',
                         f'init = ["*CLS"]\nsafe_off_init = ["*CLS", "{command}"]')
    path = _write(tmp_path, text)
    with pytest.raises(InputError) as info:
        load_profile(path)
    message = str(info.value)
    assert "\n" not in message and str(path) in message, message
    assert "profile.safe_off_init[1]" in message, message


def test_safe_off_init_takes_a_remote_enable_and_cls(tmp_path):
    """What a safe-off connection may need (a remote enable, *CLS) loads; none is the default."""
    text = LASER.replace('init = ["*CLS"]',
                         'init = ["*CLS", "SOUR:POW 1.000"]\nsafe_off_init = ["*CLS", "LINK:KEEP"]')
    profile = load_profile(_write(tmp_path, text))
    assert profile.safe_off_init == ("*CLS", "LINK:KEEP")
    assert profile.init == ("*CLS", "SOUR:POW 1.000")
    assert load_profile(_write(tmp_path, LASER)).safe_off_init == ()
