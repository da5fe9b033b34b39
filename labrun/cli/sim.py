"""``labrun sim``: the virtual lab server and a spectrum planning aid.

``sim serve`` runs simulated SCPI instruments on loopback TCP until Ctrl-C or SIGTERM.
``sim spectrum`` prints the model lines at a spool output (and can write a synthesised OSA trace),
to check before a night in the lab whether, say, the third order clears the OSA floor.
"""

from __future__ import annotations

import argparse
import json
import math
import signal
import sys
import threading
from pathlib import Path
from typing import TYPE_CHECKING

from labrun.errors import InputError

if TYPE_CHECKING:
    from labrun.physics.spool import ModelLine
    from labrun.vlab.scenario import Scenario, SpoolSpec

SPECTRUM_MODELS = ("auto", "bessel", "nlse")


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add ``sim serve`` and ``sim spectrum``."""
    sim = subparsers.add_parser("sim", help="virtual lab: simulated instruments and spool model")
    sub = sim.add_subparsers(dest="sim_command", metavar="SUBCOMMAND", required=True,
                             parser_class=type(sim))

    serve = sub.add_parser("serve", help="serve simulated SCPI instruments on loopback TCP")
    serve.add_argument("--scenario", required=True, metavar="FILE",
                       help="scenario TOML (path or shipped name, e.g. default-scenario.toml)")
    serve.add_argument("--spool", metavar="NAME",
                       help="connect this spool (one of the scenario's [[spools]] or of "
                            "--spool-file) instead of the scenario's connected one")
    serve.add_argument("--spool-file", metavar="FILE",
                       help="your own spool(s): a TOML file of [[spools]] tables as in a "
                            "scenario (name, length_km, loss_db_per_km, gamma_per_w_per_km, "
                            "dispersion_ps_per_nm_km, dispersion_slope_ps_per_nm2_km, "
                            "reference_wavelength_nm), added to the scenario's (replacing one "
                            "of the same name); a file of one spool connects it (e.g. the "
                            "shipped example-spool.toml)")
    serve.add_argument("--host", default="127.0.0.1",
                       help="address to bind (default 127.0.0.1; anything else is reachable "
                            "from the network)")
    serve.add_argument("--bench-out", metavar="FILE", help="write a bench file for this server")
    serve.add_argument("--time-scale", type=float, default=1.0, metavar="X",
                       help="real seconds per simulated second for sweeps and drift (0 = "
                            "instant; default 1)")
    serve.add_argument("--seed", type=int, default=0, help="seed of realism and faults")
    serve.set_defaults(func=run_serve)

    spec = sub.add_parser("spectrum", help="model lines at a spool output for given launch powers")
    spec.add_argument("--scenario", required=True, metavar="FILE", help="scenario TOML")
    spec.add_argument("--spool", metavar="NAME",
                      help="spool name in the scenario or --spool-file (default: the "
                           "scenario's connected spool, or the spool file's only one)")
    spec.add_argument("--spool-file", metavar="FILE",
                      help="your own spool(s): [[spools]] tables as for sim serve --spool-file")
    spec.add_argument("--power-a-dbm", type=float, required=True, metavar="X",
                      help="tone a power launched into the spool (dBm)")
    spec.add_argument("--power-b-dbm", type=float, required=True, metavar="Y",
                      help="tone b power launched into the spool (dBm)")
    spec.add_argument("--wavelength-a-nm", type=float, required=True, metavar="W",
                      help="tone a wavelength (nm, vacuum); tone b is spacing above in frequency")
    spec.add_argument("--spacing-ghz", type=float, required=True, metavar="S",
                      help="tone spacing f_b - f_a (GHz, > 0)")
    spec.add_argument("--pol-angle-deg", type=float, default=0.0, metavar="T",
                      help="angle between the two tones' linear polarisations (0 = parallel, "
                           "90 = orthogonal; copolar fraction cos^2 T)")
    spec.add_argument("--orders", type=int, default=3, metavar="N", help="sideband orders (3)")
    spec.add_argument("--model", choices=SPECTRUM_MODELS, default="auto",
                      help="bessel, nlse, or auto (bessel when dispersion is negligible)")
    spec.add_argument("--out", metavar="FILE", help="write a synthesised OSA trace (CSV)")
    spec.add_argument("--rbw-nm", type=float, default=0.02, help="RBW of the --out trace (nm)")
    spec.add_argument("--seed", type=int, default=0, help="seed of the --out trace noise")
    spec.add_argument("--json", action="store_true", help="print the lines as JSON")
    spec.set_defaults(func=run_spectrum)


# ---- serve ---------------------------------------------------------------------------------
def run_serve(args: argparse.Namespace) -> int:
    """Serve the scenario's instruments until Ctrl-C or SIGTERM; exit 0 with sources off."""
    from labrun.vlab.lab import BindError, VirtualLab, is_loopback
    from labrun.vlab.scenario import connect_spool, load_scenario

    scenario = connect_spool(load_scenario(args.scenario), args.spool, args.spool_file)
    if not math.isfinite(args.time_scale) or args.time_scale < 0:
        raise InputError("must be a number >= 0", field="--time-scale")
    if not is_loopback(args.host):
        print(f"labrun: warning: binding {args.host}: the simulated instruments are reachable "
              "from the network", file=sys.stderr)
    if args.bench_out:
        _check_writable_folder(args.bench_out, "--bench-out")
    lab = VirtualLab(scenario, time_scale=args.time_scale, seed=args.seed, host=args.host)
    try:
        lab.start()
    except BindError as exc:
        if exc.port:  # pinned by the scenario
            raise InputError(str(exc.strerror), file=scenario.source,
                             field=f"instruments.{exc.role}.port") from None
        raise InputError(str(exc.strerror), field="--host") from None
    stop = threading.Event()
    previous = {sig: signal.signal(sig, lambda *_: stop.set())
                for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        for role, resource in lab.resources.items():
            print(f"{role:<15} {resource}", flush=True)
        if args.bench_out:
            try:
                path = lab.write_bench(args.bench_out)
            except OSError as exc:
                raise InputError(f"cannot write: {exc.strerror or exc}", file=args.bench_out,
                                 field="--bench-out") from None
            print(f"bench file: {path}", flush=True)
        print(spool_text(scenario.spool()), flush=True)
        print(f"virtual lab running (spool {scenario.connected}, time scale "
              f"{args.time_scale:g}, seed {args.seed}); Ctrl-C to stop", flush=True)
        while not stop.wait(0.2):
            pass
    finally:
        lab.stop()
        for sig, handler in previous.items():
            signal.signal(sig, handler)
    print("virtual lab stopped; every simulated source is off", flush=True)
    return 0


def spool_text(spool: SpoolSpec) -> str:
    """'connected spool DSF-C31: 0.6 km, 1.5 dB/km, ...': what the virtual lab models."""
    return (f"connected spool {spool.name}: {spool.length_km:g} km, "
            f"{spool.loss_db_per_km:g} dB/km, gamma {spool.gamma_per_w_per_km:g} 1/(W km), "
            f"D {spool.dispersion_ps_per_nm_km:g} ps/(nm km), slope "
            f"{spool.dispersion_slope_ps_per_nm2_km:g} ps/(nm^2 km) at "
            f"{spool.reference_wavelength_nm:g} nm")


def _check_writable_folder(path: str, option: str) -> None:
    """Create the folder of an output file now, so a bad path fails before anything starts."""
    try:
        Path(path).parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create its folder: {exc.strerror or exc}", file=path,
                         field=option) from None


# ---- spectrum ------------------------------------------------------------------------------
def _check_spectrum_args(args: argparse.Namespace) -> None:
    """One-line InputError for any value outside what the model can take."""
    checks = (
        ("--power-a-dbm", args.power_a_dbm, -80.0, 40.0),
        ("--power-b-dbm", args.power_b_dbm, -80.0, 40.0),
        ("--wavelength-a-nm", args.wavelength_a_nm, 1200.0, 1700.0),
        ("--spacing-ghz", args.spacing_ghz, 1e-3, 5000.0),
        ("--orders", args.orders, 1, 20),
        ("--rbw-nm", args.rbw_nm, 0.001, 5.0),
        ("--pol-angle-deg", args.pol_angle_deg, -360.0, 360.0),
    )
    for name, value, lo, hi in checks:
        if not math.isfinite(value) or not lo <= value <= hi:
            raise InputError(f"{value:g} is outside [{lo:g}, {hi:g}]", field=name)


def _copolar(pol_angle_deg: float) -> float:
    """Copolar fraction of two linear polarisations at a physical angle (docs/design.md §5.5)."""
    import numpy as np

    from labrun.physics.polarisation import copolar_fraction

    two = math.radians(2.0 * pol_angle_deg)  # linear states sit at 2*angle on the Poincare sphere
    return float(np.clip(copolar_fraction((1.0, 0.0, 0.0), (math.cos(two), math.sin(two), 0.0)),
                         0.0, 1.0))


# A line less than this above the OSA floor is reported as an upper limit by the reduction
# (its default detection threshold), so the planning table uses the same margin.
SPECTRUM_MARGIN_DB = 3.0


def run_spectrum(args: argparse.Namespace) -> int:
    """Print (or write) the spool-output spectrum for the given launch."""
    from labrun.physics.spool import output_lines
    from labrun.vlab.scenario import connect_spool, load_scenario

    scenario = connect_spool(load_scenario(args.scenario), args.spool, args.spool_file)
    spool = scenario.spool()
    _check_spectrum_args(args)
    copolar = _copolar(args.pol_angle_deg)
    try:
        lines = output_lines(spool.fibre(), args.wavelength_a_nm, args.spacing_ghz,
                             args.power_a_dbm, args.power_b_dbm, args.orders, copolar=copolar,
                             model=args.model)
    except ValueError as exc:  # the model refuses work it cannot do in reasonable time
        raise InputError(str(exc), field="--power-a-dbm/--power-b-dbm") from None
    if args.out:
        _write_trace(args, scenario, spool.name, lines)
    floor = scenario.instruments.osa.floor_dbm
    floor = -70.0 if floor is None else float(floor)
    to_osa = float(scenario.bench.output_to_osa_db)
    if args.json:
        print(json.dumps({"spool": spool.name, "copolar": copolar, "osa_floor_dbm": floor,
                          "output_to_osa_db": to_osa,
                          "lines": [line.to_dict() for line in lines]}, indent=2))
    else:
        print(f"spool {spool.name}: lines at the spool output (copolar fraction {copolar:.3f})")
        print(f"  {'line':<8} {'wavelength':>13} {'frequency':>15} {'output':>13} {'at OSA':>11}"
              f"  vs OSA floor {floor:.1f} dBm")
        for line in lines:
            at_osa = line.power_dbm - to_osa
            verdict = ("clears" if at_osa >= floor + SPECTRUM_MARGIN_DB
                       else "below floor + 3 dB: not measurable")
            print(f"  {line.line.label():<8} {line.wavelength_nm:10.4f} nm "
                  f"{line.freq_thz:11.5f} THz {line.power_dbm:9.2f} dBm {at_osa:7.2f} dBm"
                  f"  {verdict}")
        if args.out:
            print(f"trace written to {args.out}")
    return 0


def _sample_count(need: int) -> int:
    """The smallest of the plans' sample counts (labrun.plan.POINT_STEPS) that holds ``need``
    samples, within the virtual lab OSA's sampling-point range (its generic profile)."""
    from labrun.plan import POINT_STEPS
    from labrun.profiles import generic_profile

    lo, hi = generic_profile("osa").op("set_points").range or (POINT_STEPS[0], POINT_STEPS[-1])
    fits = [n for n in POINT_STEPS if n >= need and lo <= n <= hi]
    return fits[0] if fits else int(hi)


def _write_trace(args: argparse.Namespace, scenario: Scenario, spool_name: str,
                 lines: list[ModelLine]) -> Path:
    """Synthesise the OSA trace (through output_to_osa_db, the scenario's OSA floor) as CSV."""
    import numpy as np

    from labrun.physics.osa import synthesize_trace
    from labrun.tracefile import write_trace_csv
    from labrun.vlab.realism import role_rng

    wl = np.array([x.wavelength_nm for x in lines])
    p = np.array([x.power_dbm for x in lines]) - scenario.bench.output_to_osa_db
    margin = max(10.0 * args.rbw_nm, 0.2 * (wl.max() - wl.min()))
    lo, hi = wl.min() - margin, wl.max() + margin
    points = _sample_count(round((hi - lo) / (args.rbw_nm / 5.0)) + 1)
    x = np.linspace(lo, hi, points)
    osa = scenario.instruments.osa
    real = scenario.realism
    y = synthesize_trace(
        x, wl, p, args.rbw_nm,
        floor_dbm=osa.floor_dbm if osa.floor_dbm is not None else -70.0,
        noise_db=real.osa_noise_db if real.enabled else 0.0,
        sensitivity_dbm=osa.sensitivity_dbm if osa.sensitivity_dbm is not None else -90.0,
        rng=role_rng(args.seed, "spectrum_trace"),
    )
    meta = {"spool": spool_name, "rbw_nm": args.rbw_nm, "seed": args.seed,
            "output_to_osa_db": scenario.bench.output_to_osa_db,
            "power_a_dbm": args.power_a_dbm, "power_b_dbm": args.power_b_dbm,
            "spacing_ghz": args.spacing_ghz}
    try:
        return write_trace_csv(args.out, x, y, metadata=meta)
    except OSError as exc:
        raise InputError(f"cannot write: {exc.strerror or exc}", file=args.out,
                         field="--out") from None
