"""``ensemble simulate``: run a scenario, write the measurement CSV and optionally the truth."""

from __future__ import annotations

import argparse
import logging

EXAMPLES = """examples:
  ensemble simulate configs/demo_scenario.toml -o demo_data/lab_demo.csv
  ensemble simulate configs/scenarios/mixed_lab_anomalies.toml -o lab.csv --truth lab_truth.h5

The scenario keys (units and defaults) are described in docs/simulator.md.
"""

log = logging.getLogger("ensemble")


def add_parser(sub, parents) -> None:
    p = sub.add_parser("simulate", parents=parents,
                       help="simulate a clock laboratory from a scenario file",
                       description="Simulate clocks of given types with seeded power-law "
                                   "noise and injected anomalies;\nwrite the measurements "
                                   "clock - reference as a long CSV and, optionally, the\n"
                                   "full truth as HDF5.  The same scenario always gives the "
                                   "same bytes.",
                       epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("scenario", metavar="SCENARIO.toml", help="scenario file")
    p.add_argument("-o", "--output", metavar="MEASUREMENTS.csv", required=True,
                   help="measurement CSV to write (mjd,clock,reference,phase)")
    p.add_argument("--truth", metavar="TRUTH.h5",
                   help="also write the truth: true phases, events, noise parameters")
    p.set_defaults(func=main)


def main(args: argparse.Namespace) -> int:
    import contextlib

    from ..atomic import atomic_output
    from ..simulate import Scenario, simulate
    from ..simulate.csvout import write_long_csv
    from ..simulate.truth import write_truth

    scenario = Scenario.from_toml(args.scenario)
    sim = simulate(scenario)
    with contextlib.ExitStack() as stack:
        # Both files are renamed into place only after both are complete.
        truth_tmp = stack.enter_context(atomic_output(args.truth)) if args.truth else None
        csv_tmp = stack.enter_context(atomic_output(args.output))
        rows = write_long_csv(csv_tmp, sim.mjd, sim.clocks, sim.phase_s, sim.reference,
                              atomic=False)
        if truth_tmp is not None:
            write_truth(truth_tmp, sim, atomic=False)
    sim_cfg = scenario.simulation
    log.info("simulated %d clocks x %d epochs (tau0 %g s, %g d from MJD %.4f, seed %d), "
             "%d events injected", sim.n_clocks, sim.n_epochs, sim.tau0_s, sim_cfg.duration_days,
             sim_cfg.start_mjd, scenario.seed, len(sim.events))
    log.info("wrote %s (%d rows)%s", args.output, rows,
             f" and {args.truth}" if args.truth else "")
    return 0
