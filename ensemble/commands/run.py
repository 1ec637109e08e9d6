"""``ensemble run``: form the time scale from a measurement file and write the archive."""

from __future__ import annotations

import argparse
import pathlib

EXAMPLES = """examples:
  ensemble run demo_data/lab_demo.csv -o lab.h5
  ensemble run demo_data/lab_demo.csv -o lab.h5 --config configs/demo.toml --overwrite
  ensemble run wide.csv --reference H1 -o lab.h5
  ensemble run today.csv --append lab.h5        (continue the archive with new epochs)

exit codes: 0 success; 2 bad input or configuration (one line names the file, row and column,
and nothing is written); 1 internal error.
"""


def add_parser(sub, parents) -> None:
    p = sub.add_parser("run", parents=parents, help="form the time scale and write the archive",
                       description="Read clock comparisons (long or wide CSV), form the ensemble "
                                   "time scale, detect anomalies, compute the steering advice "
                                   "and write the HDF5 archive (atomically: an existing archive "
                                   "is never left half-written).",
                       epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("input", metavar="INPUT", help="measurement CSV (long or wide form)")
    target = p.add_mutually_exclusive_group(required=True)
    target.add_argument("-o", "--output", metavar="ARCHIVE.h5", help="archive to write")
    target.add_argument("--append", metavar="ARCHIVE.h5",
                        help="continue this archive with the new epochs of INPUT (they must come "
                             "after its last epoch); the archive is replaced atomically")
    p.add_argument("--config", metavar="FILE.toml",
                   help="configuration (defaults if omitted; with --append the archive's own)")
    p.add_argument("--reference", metavar="NAME",
                   help="reference clock of a wide-form file (its column is absent or zero)")
    p.add_argument("--overwrite", action="store_true",
                   help="replace ARCHIVE.h5 if it exists (default: refuse)")
    p.add_argument("--report", metavar="DIR",
                   help="afterwards assess the clocks (into the archive's /assessment) and write "
                        "the HTML report into DIR")
    p.set_defaults(func=main)


def _assess_and_report(archive: str, folder: str, quiet: bool) -> None:
    """The assessment (stored in the archive) and the HTML report of a finished run."""
    from ..report import write_report

    try:
        from ..assess import assess_archive
    except ImportError:          # pragma: no cover - assessment not part of this build
        assess_archive = None
    if assess_archive is not None:
        assessment = assess_archive(archive, write=True)
        if not quiet:
            from ..assess.output import table_text
            print()
            print(table_text(assessment))
    write_report(archive, folder)


def main(args: argparse.Namespace) -> int:
    """Run the whole job and print a summary; bad input raises InputError (exit 2)."""
    import logging

    from ..config import load_config
    from ..io.csvread import summarize
    from ..pipeline import append_to_archive, run_to_archive, summary_text
    from ..steering.output import CAUTIONS, summarize as steering_summary

    log = logging.getLogger("ensemble")
    if args.append:
        if args.overwrite:
            from ..errors import InputError
            raise InputError("--overwrite does not go with --append", path=args.append)
        result = append_to_archive(args.input, args.append, config=args.config,
                                   reference=args.reference, progress=not args.quiet)
        cfg = load_config(args.config) if args.config else None
        if cfg is None:
            import tomllib

            from ..config import parse_config
            from .. import open_archive
            with open_archive(args.append) as arc:
                cfg = parse_config(tomllib.loads(arc.attrs["config_toml"]))
    else:
        cfg = load_config(args.config)
        output = pathlib.Path(args.output)
        if output.parent != pathlib.Path("") and not output.parent.exists():
            output.parent.mkdir(parents=True)
        result = run_to_archive(args.input, args.output, config=cfg, reference=args.reference,
                                overwrite=args.overwrite, progress=not args.quiet)
    if not args.quiet:
        print(summarize(result.measurements))
        print()
        print(summary_text(result))
        if result.steering:
            print()
            print(f"steering advice for the output driven by {result.steering_clock}:")
            for line in steering_summary(result.steering, cfg.steering):
                print(f"  {line}")
            print("cautions:")
            for line in CAUTIONS:
                print(f"  - {line}")
    if args.report:
        _assess_and_report(result.archive, args.report, args.quiet)
    if args.append:
        note = (" (re-formed from its measurements: its start-up stretch was not complete)"
                if result.reformed else "")
        print(f"archive continued: {result.archive}{note}")
    else:
        print(f"archive written: {result.archive}")
    if args.report:
        print(f"report written: {pathlib.Path(args.report) / 'index.html'}")
    log.debug("configuration: %s", args.config or "defaults")
    return 0
