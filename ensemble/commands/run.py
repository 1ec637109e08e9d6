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
                                   "the HDF5 archive.",
                       epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("input", metavar="INPUT", help="measurement CSV (long or wide form)")
    p.add_argument("-o", "--output", metavar="ARCHIVE.h5", help="archive to write")
    p.add_argument("--config", metavar="FILE.toml", help="configuration (defaults if omitted)")
    p.add_argument("--reference", metavar="NAME",
                   help="reference clock of a wide-form file (its column is absent or zero)")
    p.set_defaults(func=main)


def main(args: argparse.Namespace) -> int:
    from ..io.csvread import read_measurements, summarize

    meas = read_measurements(args.input, reference=args.reference)
    print(summarize(meas))
    return 0
