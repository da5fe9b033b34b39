"""Malformed input files for the fuzz test and benchmarks/fuzz_inputs.py (issue 13 item 5).

``make_case(rng, folder)`` takes a valid shipped file (plan, bench, profile, scenario, or a trace
written here), applies one or two mutations drawn from ``rng`` (a ``random.Random``; the test
passes hypothesis' controllable one) and returns a ``Case``: the files written, the ``labrun``
command that reads them, and whether the input is known to be bad. ``run_case`` runs the real
CLI entry point in-process with instrument access forbidden and classifies the outcome:

ok        exit 0 (or exit 1 from ``check`` with a report) with a valid, finite JSON result,
refused   exit 2 with exactly one line on stderr,
and the failures: traceback (an exception escaped ``labrun.cli.main``), hang (over the time
limit, CPU or wall), accepted (a known-bad input ended in a result), bad_result (a result
holding NaN, infinity or a detected line without a power), bad_message (exit 2 without exactly
one line), opened (an instrument session was opened outside a ``labrun check`` rehearsal).
"""

from __future__ import annotations

import contextlib
import io
import json
import re
import signal
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from random import Random
from typing import Any

import numpy as np
from _no_visa import visa_refused

from labrun.resources import data_dir

SWEEPS = data_dir("sweeps")
SIM = data_dir("sim_instruments")
DRIVERS = data_dir("drivers")
BENCH_NAME = "bench-pyvisa-sim.toml"
PLANS = ("power-sweep.toml", "spacing-sweep.toml", "polarisation-sweep.toml")
KINDS = ("plan", "bench", "profile", "scenario", "trace")
FAILURES = ("traceback", "hang", "accepted", "bad_result", "bad_message", "opened")

# Values that are never a valid number anywhere (the examples), and values that may or
# may not be valid where they land (only the outcome's form is checked then).
BAD_NUMBERS = ("nan", "inf", "-inf", "+inf", "true", "false", '"12"', "[]", "{}")
ODD_NUMBERS = ("0", "-1", "1e308", "-1e308", "1e-320", "1000000000", "100000", "-0.0", "3",
               "0.5", "2.5e4", "1e5", "[1.0, 2.0]")
# Edits of a profile's command strings that must be refused (one command per template, plain
# specs, no line end).
TEMPLATE_EDITS = ("{t};:OUTP:STAT ON", "{t};:SOUR:POW 13", "{t}\\n*RST", "{t}\\rOUTP ON",
                  "{t}\\u0000", "{t} {{value:>99999999999}}", "{t} {{value!r}}",
                  "{t} {{value:{{value}}}}", "{t} {{value:020.3f}}")
SOURCE_ON_INIT = ("OUTP:STAT ON", "OUTP ON", "SOUR:POW:STAT ON", ":outp1:state 1",
                  "OUTPUT:STATE ON")
TIME_LIMIT_S = 20.0


@dataclass
class Case:
    """One generated input: the command that reads it and whether it is known to be bad."""

    kind: str
    argv: list[str]
    bad: bool
    what: list[str] = field(default_factory=list)


@dataclass
class Outcome:
    """How one case ended: 'ok', 'refused' or one of FAILURES, with the evidence."""

    verdict: str
    code: int | None
    seconds: float
    detail: str = ""


# ----------------------------------------------------------------------------- mutations

_ASSIGN = re.compile(r"^(\s*[A-Za-z_][\w.-]*\s*=\s*)(.+?)\s*(#.*)?$")
_NUMBER = re.compile(r"^[+-]?(\d[\d_]*(\.\d+)?([eE][+-]?\d+)?|inf|nan)$")


def _assignments(text: str) -> list[tuple[int, str, str]]:
    """(line number, prefix, value) of every ``key = value`` line."""
    out = []
    for i, line in enumerate(text.splitlines()):
        m = _ASSIGN.match(line)
        if m and not line.lstrip().startswith("#"):
            out.append((i, m.group(1), m.group(2)))
    return out


def _set_line(text: str, i: int, new: str) -> str:
    lines = text.splitlines()
    lines[i] = new
    return "\n".join(lines) + "\n"


def mutate_value(rng: Random, text: str) -> tuple[str, bool, str]:
    """Replace one value: a number by a bad or odd number, a boolean by a number."""
    spots = _assignments(text)
    numeric = [s for s in spots if _NUMBER.match(s[2])]
    booleans = [s for s in spots if s[2] in ("true", "false")]
    pool = numeric + booleans
    if not pool:
        return text, False, "no value to change"
    i, prefix, value = rng.choice(pool)
    if value in ("true", "false"):
        new, bad = rng.choice(("1", "0", "1.0", '"yes"')), True
    elif rng.random() < 0.5:
        new, bad = rng.choice(BAD_NUMBERS), True
    else:
        new, bad = rng.choice(ODD_NUMBERS), False
    return _set_line(text, i, f"{prefix}{new}"), bad, f"line {i + 1}: {value} -> {new}"


def mutate_nudge(rng: Random, text: str) -> tuple[str, bool, str]:
    """Scale one number by a modest factor: often still valid, exercising the accepting paths."""
    spots = [s for s in _assignments(text) if _NUMBER.match(s[2]) and "nan" not in s[2]
             and "inf" not in s[2]]
    if not spots:
        return text, False, "no number to nudge"
    i, prefix, value = rng.choice(spots)
    factor = rng.choice((0.5, 0.9, 0.99, 1.01, 1.1, 2.0, 10.0))
    number = float(value.replace("_", ""))
    new = str(int(number * factor)) if re.fullmatch(r"[+-]?\d+", value) else f"{number * factor:g}"
    return _set_line(text, i, f"{prefix}{new}"), False, f"line {i + 1}: {value} -> {new}"


def mutate_array_item(rng: Random, text: str) -> tuple[str, bool, str]:
    """Replace one number inside an inline array by NaN, infinity or a boolean."""
    spots = [s for s in _assignments(text) if s[2].startswith("[") and re.search(r"\d", s[2])]
    if not spots:
        return mutate_value(rng, text)
    i, prefix, value = rng.choice(spots)
    nums = list(re.finditer(r"(?<![\w.])-?\d+(\.\d+)?([eE][+-]?\d+)?", value))
    m = rng.choice(nums)
    new = rng.choice(("nan", "inf", "-inf", "true"))
    changed = value[:m.start()] + new + value[m.end():]
    return _set_line(text, i, prefix + changed), True, f"line {i + 1}: item {m.group()} -> {new}"


def mutate_structure(rng: Random, text: str) -> tuple[str, bool, str]:
    """Delete, duplicate or truncate lines, or add a deeply nested or unknown key."""
    lines = text.splitlines()
    choice = rng.randrange(5)
    if choice == 0 and lines:
        i = rng.randrange(len(lines))
        del lines[i]
        return "\n".join(lines) + "\n", False, f"line {i + 1} deleted"
    if choice == 1 and lines:
        i = rng.randrange(len(lines))
        lines.insert(i, lines[i])
        return "\n".join(lines) + "\n", False, f"line {i + 1} doubled"
    if choice == 2:
        cut = rng.randrange(max(1, len(text)))
        return text[:cut], False, f"truncated at {cut}"
    if choice == 3:
        depth = rng.choice((20, 60, 3000))
        return f"deep = {'[' * depth}{']' * depth}\n" + text, True, f"nesting {depth}"
    return text + "\n[unknown_table]\nx = 1\n", True, "unknown table"


def mutate_bytes(rng: Random, raw: bytes) -> tuple[bytes, bool, str]:
    """Bytes that are not UTF-8 (a Latin-1 or a stray continuation byte) somewhere inside."""
    at = rng.randrange(len(raw) + 1)
    junk = rng.choice((b"\xff", b"\xe9", b"\xc3(", b"\x80\x80", b"\xed\xa0\x80"))
    return raw[:at] + junk + raw[at:], True, f"non-UTF-8 {junk!r} at {at}"


def mutate_template(rng: Random, text: str) -> tuple[str, bool, str]:
    """Give a profile command a second command, a line end or a non-plain spec; or switch a
    source on in init."""
    if rng.random() < 0.25:
        cmd = rng.choice(SOURCE_ON_INIT)
        new = re.sub(r'^init = \[(.*)\]', lambda m: f'init = [{m.group(1)}, "{cmd}"]', text,
                     count=1, flags=re.M)
        return new, new != text, f"init += {cmd}"
    spots = [s for s in _assignments(text)
             if s[1].strip().startswith(("command", "query", "error_query", "opc_query",
                                         "write_termination", "format_command"))]
    i, prefix, value = rng.choice(spots)
    edit = rng.choice(TEMPLATE_EDITS)
    inner = value[1:-1]
    new = '"' + edit.format(t=inner) + '"'
    return _set_line(text, i, prefix + new), True, f"line {i + 1}: {value} -> {new}"


TextMutation = Callable[[Random, str], tuple[str, bool, str]]
TOML_MUTATIONS: tuple[TextMutation, ...] = (mutate_value, mutate_value, mutate_nudge,
                                            mutate_nudge, mutate_array_item, mutate_structure)


def _mutate_toml(rng: Random, text: str, extra: tuple[TextMutation, ...] = ()
                 ) -> tuple[bytes, bool, list[str]]:
    """One or two mutations of TOML text; sometimes non-UTF-8 bytes on top."""
    bad, what = False, []
    for _ in range(rng.choice((1, 1, 2))):
        if bad:  # a later edit could undo a known-bad one (same line changed, line deleted)
            break
        text, b, w = rng.choice(TOML_MUTATIONS + extra)(rng, text)
        bad, what = bad or b, [*what, w]
    raw = text.encode("utf-8")
    if rng.random() < 0.1:
        raw, b, w = mutate_bytes(rng, raw)
        bad, what = bad or b, [*what, w]
    return raw, bad, what


# ----------------------------------------------------------------------------- cases


def _plan_case(rng: Random, folder: Path) -> Case:
    name = rng.choice(PLANS)
    raw, bad, what = _mutate_toml(rng, (SWEEPS / name).read_text(encoding="utf-8"))
    (folder / "plan.toml").write_bytes(raw)
    return Case("plan", ["check", str(folder / "plan.toml"), "--bench", BENCH_NAME, "--json"],
                bad, [name, *what])


def _bench_case(rng: Random, folder: Path) -> Case:
    raw, bad, what = _mutate_toml(rng, (SIM / BENCH_NAME).read_text(encoding="utf-8"))
    (folder / "bench.toml").write_bytes(raw)
    return Case("bench", ["check", rng.choice(PLANS), "--bench", str(folder / "bench.toml"),
                          "--json"], bad, what)


def _profile_case(rng: Random, folder: Path) -> Case:
    bench = (SIM / BENCH_NAME).read_text(encoding="utf-8")
    roles = re.findall(r'\[instruments\.(\w+)\][^\[]*?profile = "([^"]+)"', bench, re.S)
    role, profile = rng.choice(roles)
    text = (DRIVERS / f"{profile}.toml").read_text(encoding="utf-8")
    text = text.replace(f'name = "{profile}"', 'name = "fuzz-profile"', 1)
    raw, bad, what = _mutate_toml(rng, text, (mutate_template, mutate_template))
    (folder / "fuzz-profile.toml").write_bytes(raw)
    ours = re.sub(rf'(\[instruments\.{role}\][^\[]*?profile = )"[^"]+"',
                  lambda m: f'{m.group(1)}"{folder / "fuzz-profile.toml"}"', bench, count=1,
                  flags=re.S)
    (folder / "bench.toml").write_text(ours, encoding="utf-8")
    plan = rng.choice(PLANS)
    return Case("profile", ["check", plan, "--bench", str(folder / "bench.toml"), "--json"],
                bad, [f"{role}: {profile}", *what])


def _scenario_case(rng: Random, folder: Path) -> Case:
    text = (SIM / "default-scenario.toml").read_text(encoding="utf-8")
    raw, bad, what = _mutate_toml(rng, text)
    (folder / "scenario.toml").write_bytes(raw)
    spool = rng.choice(("HNLF-A17", "SMF-B02"))
    power = rng.choice(("0", "5", "10", "nan", "45"))
    argv = ["sim", "spectrum", "--scenario", str(folder / "scenario.toml"), "--spool", spool,
            "--power-a-dbm", power, "--power-b-dbm", "3", "--wavelength-a-nm", "1550",
            "--spacing-ghz", rng.choice(("50", "100")), "--json"]
    return Case("scenario", argv, bad or power in ("nan", "45"), [spool, f"power {power}",
                                                                  *what])


def trace_text(rng: Random) -> tuple[list[str], list[str]]:
    """A plausible two-tone OSA export (header lines, data rows) around 1550 nm."""
    from labrun.physics.osa import synthesize_trace

    c = 299_792.458  # nm THz (SI)
    f = 193.4 + np.array([-1, 0, 1, 2]) * 0.1
    wl = c / f
    x = np.arange(wl.min() - 0.8, wl.max() + 0.8, 0.01)
    y = synthesize_trace(x, wl, [-40.0, 0.0, -1.0, -41.0], 0.05, floor_dbm=-65.0, noise_db=0.1,
                         rng=np.random.default_rng(rng.randrange(1000)))
    head = ["OSA export", "# rbw_nm: 0.05", "wavelength_nm,power_dbm"]
    return head, [f"{a:.4f},{b:.3f}" for a, b in zip(x, y, strict=True)]


def _trace_case(rng: Random, folder: Path) -> Case:
    head, rows = trace_text(rng)
    kind = rng.randrange(7)
    bad, what = True, ""
    if kind == 0:
        i = rng.randrange(len(rows))
        v = rng.choice(("1e5", "nan", "inf", "-inf", "1e308", "abc", "", "61", "-1e308"))
        rows[i] = f"{rows[i].split(',')[0]},{v}"
        what = f"row {i}: power {v}"
    elif kind == 1:
        i = rng.randrange(len(rows))
        v = rng.choice(("0", "-1550", "1e-300", "1e300", "nan", "x"))
        rows[i] = f"{v},{rows[i].split(',')[1]}"
        what = f"row {i}: wavelength {v}"
    elif kind == 2:
        i = rng.randrange(1, len(rows))
        rows[i], rows[i - 1] = rows[i - 1], rows[i]
        what = f"rows {i - 1}, {i} swapped"
    elif kind == 3:
        n = rng.choice((0, 3, 7))
        rows = rows[:n]
        what = f"{n} rows"
    elif kind == 4:
        head[1] = f"# rbw_nm: {rng.choice(('nan', 'inf', '0', '-0.05', '1e308', 'abc'))}"
        what = head[1]
    elif kind == 5:
        bad = False
        v = rng.choice(("0.001", "0.5", "5", "1e-6"))
        head[1] = f"# rbw_nm: {v}"
        what = f"odd rbw {v}"
    else:
        bad = False
        step = rng.choice((1, 5, 50, 200))
        rows = rows[::step]
        what = f"every {step}th row"
    raw = ("\n".join(head + rows) + "\n").encode("utf-8")
    if rng.random() < 0.1:
        raw, _, w = mutate_bytes(rng, raw)
        bad, what = True, f"{what}; {w}"
    (folder / "trace.csv").write_bytes(raw)
    argv = ["analyze", str(folder / "trace.csv"), "--json"]
    if rng.random() < 0.2:
        t = rng.choice(("nan", "inf", "-1", "3", "0"))
        argv += ["--threshold-db", t]
        bad = bad or t in ("nan", "inf", "-1")
        what += f"; --threshold-db {t}"
    return Case("trace", argv, bad, [what])


MAKERS = {"plan": _plan_case, "bench": _bench_case, "profile": _profile_case,
          "scenario": _scenario_case, "trace": _trace_case}


def make_case(rng: Random, folder: Path, kind: str | None = None) -> Case:
    """A malformed (or odd but maybe valid) input of ``kind`` (random when None)."""
    return MAKERS[kind or rng.choice(KINDS)](rng, folder)


# ----------------------------------------------------------------------------- running


class _TimeLimit(BaseException):
    """Raised by the alarm: not an Exception, so nothing in labrun can swallow it."""


class _Opened(BaseException):
    """Raised when a command tries to open an instrument session."""


def _finite_json(obj: Any) -> str | None:
    """Why a JSON result is not valid: a non-finite number, or a detected line without power."""
    if isinstance(obj, dict):
        if obj.get("detected") and "power_dbm" in obj and obj["power_dbm"] is None:
            return f"detected line without power: {obj}"
        for v in obj.values():
            why = _finite_json(v)
            if why:
                return why
    elif isinstance(obj, list):
        for v in obj:
            why = _finite_json(v)
            if why:
                return why
    elif isinstance(obj, float) and not np.isfinite(obj):
        return f"non-finite number {obj}"
    return None


def _no_constants(name: str) -> float:
    raise ValueError(f"JSON holds {name}")


def run_case(case: Case, *, time_limit_s: float = TIME_LIMIT_S,
             overrides: dict[str, Any] | None = None) -> Outcome:
    """Run ``labrun <argv>`` in-process (instrument sessions forbidden) and classify it.

    A hang is more than ``time_limit_s`` of CPU (the process's, so a loaded shared machine does
    not turn slow into hung), or three times that in wall time (a wait that uses no CPU).
    ``overrides`` go to ``labrun.cli.main`` (a test's stand-in for a command's function).
    """
    from labrun.cli import main

    def alarm(*_: Any) -> None:
        raise _TimeLimit()

    out, err = io.StringIO(), io.StringIO()
    previous = {sig: signal.signal(sig, alarm) for sig in (signal.SIGALRM, signal.SIGPROF)}
    signal.setitimer(signal.ITIMER_PROF, time_limit_s)
    signal.setitimer(signal.ITIMER_REAL, 3.0 * time_limit_s)
    start = time.perf_counter()
    code: int | None = None
    try:
        with visa_refused(_Opened), contextlib.redirect_stdout(out), \
                contextlib.redirect_stderr(err):
            try:
                code = main(case.argv, overrides=overrides)
            except SystemExit as exc:  # argparse usage errors
                code = exc.code if isinstance(exc.code, int) else 2
    except _TimeLimit:
        return Outcome("hang", None, time.perf_counter() - start, " ".join(case.argv))
    except _Opened as exc:
        return Outcome("opened", None, time.perf_counter() - start, str(exc))
    except Exception as exc:  # noqa: BLE001 - a traceback is what the fuzzer looks for
        return Outcome("traceback", None, time.perf_counter() - start,
                       f"{type(exc).__name__}: {exc}"[:300])
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.setitimer(signal.ITIMER_PROF, 0)
        for sig, handler in previous.items():
            signal.signal(sig, handler)
    seconds = time.perf_counter() - start
    stderr = err.getvalue()
    if code == 2:
        lines = stderr.strip().splitlines()
        if len(lines) != 1:
            return Outcome("bad_message", code, seconds, stderr[:300])
        return Outcome("refused", code, seconds, lines[0][:300])
    if code == 0 or (code == 1 and case.argv[0] == "check"):
        try:
            result = json.loads(out.getvalue(), parse_constant=_no_constants)
        except ValueError as exc:
            return Outcome("bad_result", code, seconds, f"{exc}; {stderr[:200]}")
        why = _finite_json(result)
        if why:
            return Outcome("bad_result", code, seconds, why[:300])
        if case.bad:
            return Outcome("accepted", code, seconds, "; ".join(case.what)[:300])
        return Outcome("ok", code, seconds)
    return Outcome("bad_message", code, seconds, f"exit {code}: {stderr[:300]}")
