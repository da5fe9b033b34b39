"""``labrun analyze TRACE.csv``: reduce one saved OSA trace to tone and sideband powers.

Prints a table, or the JSON of Reduction.to_dict() with --json; --plot draws the trace with
each line labelled. The RBW comes from --rbw-nm or from the file's ``# rbw_nm:`` metadata line.
"""

from __future__ import annotations

import argparse
import json
from typing import TYPE_CHECKING, Literal

from labrun.errors import InputError

if TYPE_CHECKING:  # the reduction pulls in scipy.signal: import it only when a trace is reduced
    from labrun.reduce import Reduction


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``analyze`` command."""
    p = subparsers.add_parser(
        "analyze", help="reduce a saved trace (CSV) to tone and sideband powers",
        description="Reduce a CSV trace (wavelength_nm,power_dbm or frequency_thz,power_dbm; "
                    "leading metadata lines allowed) to tone and sideband powers.",
    )
    p.add_argument("trace", metavar="TRACE.csv", help="trace file")
    p.add_argument("--rbw-nm", type=float, default=None,
                   help="resolution bandwidth in nm (default: the file's rbw_nm metadata)")
    p.add_argument("--orders", type=int, default=3, help="sideband orders per side (default 3)")
    p.add_argument("--threshold-db", type=float, default=3.0,
                   help="a line less than this above the floor is not detected (default 3)")
    p.add_argument("--integrate", action="store_true",
                   help="power by integration over the noise-equivalent bandwidth, not by peak")
    p.add_argument("--tones-nm", type=float, nargs=2, metavar=("A", "B"), default=None,
                   help="expected tone wavelengths (default: the two strongest peaks)")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.add_argument("--plot", metavar="FILE.png", default=None, help="write a labelled plot")
    p.set_defaults(func=run_analyze)


def run_analyze(args: argparse.Namespace) -> int:
    """Read, reduce, print; InputError (exit 2) for a bad file or option."""
    from labrun.physics.units import nm_to_ghz_at, nm_to_thz, thz_to_nm
    from labrun.reduce import reduce_trace
    from labrun.tracefile import read_trace_csv

    trace = read_trace_csv(args.trace)
    rbw_nm = args.rbw_nm if args.rbw_nm is not None else trace.rbw_nm
    if rbw_nm is None:
        raise InputError("no RBW: give --rbw-nm or a '# rbw_nm: VALUE' line", file=args.trace,
                         field="rbw_nm")
    if not 0 < rbw_nm <= 10.0:  # NaN fails too
        raise InputError(f"RBW {rbw_nm:g} nm is outside (0, 10] nm", file=args.trace,
                         field="rbw_nm")
    if not 0 <= args.orders <= 20:
        raise InputError("--orders must be between 0 and 20", field="--orders")
    if not 0.0 <= args.threshold_db <= 100.0:
        raise InputError(f"{args.threshold_db:g} dB is outside [0, 100] dB", field="--threshold-db")
    for value in args.tones_nm or ():
        if not 600.0 <= value <= 2500.0:
            raise InputError(f"{value:g} nm is outside [600, 2500] nm", field="--tones-nm")
    centre = float(trace.x[trace.x.size // 2])
    if trace.x_unit == "nm":
        rbw = rbw_nm
    else:
        rbw = float(nm_to_ghz_at(rbw_nm, float(thz_to_nm(centre)))) * 1e-3
    expected: tuple[float, float] | None = None
    if args.tones_nm is not None:  # argparse took exactly two (nargs=2)
        tone_a, tone_b = (float(v) for v in nm_to_thz(args.tones_nm))
        expected = (tone_a, tone_b)
    try:
        x_unit: Literal["nm", "thz"] = "nm" if trace.x_unit == "nm" else "thz"  # one of these
        red = reduce_trace(trace.x, trace.y_dbm, rbw, x_unit=x_unit, orders=args.orders,
                           expected_thz=expected, threshold_db=args.threshold_db,
                           power_method="integrate" if args.integrate else "peak")
    except ValueError as exc:
        raise InputError(str(exc), file=args.trace) from None
    red.rbw_nm = rbw_nm
    if args.plot:
        from labrun.plots import plot_trace

        plot_trace(args.plot, trace.x, trace.y_dbm, red, x_unit=trace.x_unit,
                   title=f"{args.trace}: spacing {red.spacing_ghz or 0:.2f} GHz, "
                         f"RBW {rbw_nm:g} nm")
    if args.json:
        print(json.dumps(red.to_dict(), indent=2))
    else:
        print(format_table(red))
    return 0


def format_table(red: Reduction) -> str:
    """Plain-text table of the lines, then spacing, floor and flags."""
    rows = [f"{'line':<9}{'freq THz':>12}{'wl nm':>12}{'power dBm':>11}{'floor dBm':>11}"
            f"{'SNR dB':>8}  note"]
    for ln in red.lines:
        if ln.detected:
            power = f"{ln.power_dbm:11.2f}"
            note = "saturated" if ln.saturated else ""
        elif ln.upper_limit_dbm is not None:
            power = f"{'<' + format(ln.upper_limit_dbm, '.2f'):>11}"
            note = "not detected"
        else:
            power, note = f"{'-':>11}", "outside trace"
        floor = f"{ln.floor_dbm:11.2f}" if ln.floor_dbm is not None else f"{'-':>11}"
        snr = f"{ln.snr_db:8.1f}" if ln.snr_db is not None else f"{'-':>8}"
        rows.append(f"{ln.line_id.label():<9}{ln.freq_thz:12.5f}{ln.wavelength_nm:12.4f}"
                    f"{power}{floor}{snr}  {note}".rstrip())
    spacing = f"{red.spacing_ghz:.3f} GHz" if red.spacing_ghz is not None else "n/a"
    floor = f"{red.floor_dbm:.2f} dBm" if red.floor_dbm is not None else "n/a"
    rows.append(f"spacing {spacing}; floor {floor}")
    rows.extend(f"flag {note}" for note in red.notes)
    return "\n".join(rows)
