"""``ensemble run``: form the time scale from a measurement file and write the archive."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  ensemble run demo_data/lab_demo.csv -o lab.h5
  ensemble run wide.csv --reference HM1 -o lab.h5 --config configs/default.toml
"""


def add_parser(sub, parents) -> None:
    p = sub.add_parser("run", parents=parents, help="form the time scale and write the archive",
                       description="Read clock comparisons (long or wide CSV), form the ensemble "
                                   "time scale, detect anomalies, compute steering and write "
                                   "the HDF5 archive.  This version reads and validates the "
                                   "input and prints a summary; it writes no archive yet.",
                       epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("input", metavar="INPUT", help="measurement CSV (long or wide form)")
    p.add_argument("-o", "--output", metavar="ARCHIVE.h5", help="archive to write")
    p.add_argument("--config", metavar="FILE.toml", help="configuration (defaults if omitted)")
    p.add_argument("--reference", metavar="NAME",
                   help="reference clock of a wide-form file (its column is absent or zero)")
    p.set_defaults(func=main)


def main(args: argparse.Namespace) -> int:
    """Read and validate the input and print its summary (the engine is not wired in yet).

    Bad input raises :class:`~ensemble.errors.InputError`, which the CLI turns into one line on
    stderr and exit status 2.  Nothing is written: with ``-o`` one line says so.
    """
    from ..io.csvread import read_measurements, summarize

    meas = read_measurements(args.input, reference=args.reference)
    print(summarize(meas))
    if args.output:
        print(f"no archive written: this version reads and checks the input only; "
              f"{args.output} was not created or changed")
    return 0
