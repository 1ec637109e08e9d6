"""``ensemble steer``: the steering commands of an archive for an operator, or a closed-loop
simulation of a policy before it is applied."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  ensemble steer lab.h5 -o commands.csv --units hz --nominal-hz 10e6
  ensemble steer lab.h5 --units ns/day --threshold-ns 0.5
  ensemble steer --simulate configs/steering_examples.toml --plot loop.png -o commands.csv

signs: a positive change makes the steered output run faster; phase error = output - target.
The cautions are printed every time; the commands are advice, never applied by this tool.
"""


def add_parser(sub, parents) -> None:
    p = sub.add_parser("steer", parents=parents,
                       help="steering commands for the output, or a closed-loop simulation",
                       description="Read the /steering table of an archive and write the "
                                   "command epochs as CSV in the synthesizer's units, with a "
                                   "dry-run summary; or simulate a policy in closed loop.",
                       epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("archive", metavar="ARCHIVE.h5", nargs="?",
                   help="archive written by 'ensemble run'")
    p.add_argument("--simulate", metavar="FILE.toml",
                   help="simulate the scenario of this file instead of reading an archive")
    p.add_argument("-o", "--output", metavar="COMMANDS.csv",
                   help="write the command epochs to this CSV file")
    p.add_argument("--units", choices=("fractional", "hz", "ps/s", "ns/day"),
                   help="units of the extra change/total columns and of the summary "
                        "(default: fractional, or hz with --nominal-hz)")
    p.add_argument("--nominal-hz", type=float, metavar="HZ",
                   help="nominal output frequency for Hz units, e.g. 5e6 or 10e6")
    p.add_argument("--threshold-ns", type=float, default=1.0, metavar="NS",
                   help="phase-error threshold of the settling figures (default 1 ns)")
    p.add_argument("--horizon-days", type=float, default=365.0, metavar="DAYS",
                   help="length of the noise-free projection (default 365 days)")
    p.add_argument("--config", metavar="FILE.toml",
                   help="[steering] settings for limits and projection (default: the archive's "
                        "own configuration)")
    p.add_argument("--plot", metavar="FILE.png", help="with --simulate: write a PNG plot")
    p.set_defaults(func=main)


def main(args: argparse.Namespace) -> int:
    import numpy as np

    from ..errors import InputError
    from ..steering.output import (cautions_text, read_steering_table, records_to_columns,
                                   summarize, write_commands_csv)
    from ..steering.settings import load_steering_settings

    if (args.archive is None) == (args.simulate is None):
        raise InputError("give either ARCHIVE.h5 or --simulate FILE.toml (not both)")
    if args.plot and not args.simulate:
        raise InputError("--plot needs --simulate FILE.toml")
    units = args.units or ("hz" if args.nominal_hz is not None else "fractional")
    if units == "hz" and not (args.nominal_hz is not None and args.nominal_hz > 0):
        raise InputError("--units hz needs --nominal-hz (the output's nominal frequency in Hz, "
                         "e.g. 10e6)", column="--nominal-hz")
    if not args.threshold_ns > 0 or not args.horizon_days > 0:
        raise InputError("--threshold-ns and --horizon-days must be > 0")
    threshold_s = args.threshold_ns * 1e-9

    extra = []
    if args.simulate:
        from ..steering.closedloop import load_simulation, simulate_closed_loop

        setup = load_simulation(args.simulate)
        settings = setup.steering
        result = simulate_closed_loop(setup)
        columns = records_to_columns(result.records)
        source = f"simulation {args.simulate} (seed {setup.simulation.seed}, "
        source += f"{setup.simulation.days:g} days every {setup.simulation.step_h:g} h)"
        true = result.true_phase_error_s
        tail = true[int(0.75 * true.size):]
        extra.append(f"true phase error over the last quarter: rms {np.sqrt(np.mean(tail ** 2)) * 1e9:.3f}"
                     f" ns, largest {np.max(np.abs(tail)) * 1e9:.3f} ns (measurement noise "
                     f"{result.measurement_noise_s * 1e9:g} ns)")
        below = np.abs(true) < threshold_s
        if below[-1]:
            bad = np.nonzero(~below)[0]
            start = 0 if bad.size == 0 else bad[-1] + 1
            extra.append(f"true phase error under {args.threshold_ns:g} ns from day "
                         f"{result.elapsed_d[start]:.2f} on")
        else:
            extra.append(f"true phase error not under {args.threshold_ns:g} ns at the end")
        if args.plot:
            from ..steering.plot import plot_simulation
            plot_simulation(result, args.plot)
            extra.append(f"wrote {args.plot}")
    else:
        columns, attrs = read_steering_table(args.archive)
        if args.config:
            settings = load_steering_settings(args.config)
        elif attrs.get("config_toml"):
            settings = load_steering_settings(args.archive, text=str(attrs["config_toml"]))
        else:
            settings = load_steering_settings()
        source = f"archive {args.archive}"

    print(f"steering: {source}")
    print("signs: change > 0 makes the output run faster; phase error = output - target")
    for line in summarize(columns, settings, threshold_s=threshold_s, units=units,
                          nominal_hz=args.nominal_hz, horizon_d=args.horizon_days):
        print(f"  {line}")
    for line in extra:
        print(f"  {line}")
    if args.output:
        n = write_commands_csv(args.output, columns, units=units, nominal_hz=args.nominal_hz)
        print(f"  wrote {args.output}: {n} command epochs")
    print()
    print(cautions_text(settings))
    return 0
