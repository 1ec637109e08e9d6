"""``ensemble assess``: judge every clock of an archive -- keep, watch or retire -- with the
evidence behind each verdict."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  ensemble assess lab.h5
  ensemble assess lab.h5 --what-if --plots assess_plots
  ensemble assess lab.h5 --json > assessment.json
  ensemble assess lab.h5 --config lab.toml --no-store

The verdicts are advisory: each comes with the numbers and the thresholds behind it.
exit codes: 0 success; 2 bad input or configuration (one line); 1 internal error.
"""


def add_parser(sub, parents) -> None:
    p = sub.add_parser("assess", parents=parents,
                       help="judge each clock: keep, watch or retire, with the evidence",
                       description="Assess every clock of an archive: its own stability "
                                   "(N-cornered hat of the pair differences) against its "
                                   "type's typical levels, its noise levels, frequency and "
                                   "drift relative to the scale, anomalies, weight history, "
                                   "ageing trends and holdover; optionally how the scale "
                                   "changes without it. Prints a table (or JSON) and stores "
                                   "the results in the archive's /assessment group.",
                       epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("archive", metavar="ARCHIVE.h5", help="archive written by ensemble run")
    p.add_argument("--json", action="store_true",
                   help="print a JSON list, one object per clock (clock, verdict, reasons and "
                        "the evidence numbers)")
    p.add_argument("--what-if", action="store_true",
                   help="re-form the scale without each member clock in turn (one ensemble "
                        "run per clock, in parallel on the local cores)")
    p.add_argument("--config", metavar="FILE.toml",
                   help="take [assessment] and the [clocks.NAME] types from this file instead "
                        "of the archive's configuration")
    p.add_argument("--plots", metavar="DIR",
                   help="write PNG plots of each clock's stability and trends into DIR")
    p.add_argument("--no-store", action="store_true",
                   help="do not write the /assessment group into the archive")
    p.set_defaults(func=main)


def main(args: argparse.Namespace) -> int:
    """Assess, print, store and plot; bad input raises InputError/ConfigError (exit 2)."""
    import logging
    import pathlib

    from ..assess.core import assess_archive
    from ..assess.display import table_text, to_json, write_assessment
    from ..config import load_config
    from ..errors import InputError

    log = logging.getLogger("ensemble")
    override = load_config(args.config) if args.config else None
    if args.plots:
        folder = pathlib.Path(args.plots)
        if folder.exists() and not folder.is_dir():
            raise InputError("--plots must name a folder", path=str(folder))
    result = assess_archive(args.archive, what_if=args.what_if, config=override,
                            progress=not args.quiet and not args.json)
    if args.json:
        print(to_json(result))
    elif not args.quiet:
        print(table_text(result))
    if not args.no_store:
        write_assessment(args.archive, result, result.details["config_toml"])
        log.info("assessment stored in %s (/assessment)", args.archive)
    if args.plots:
        from ..assess.plots import write_plots

        folder.mkdir(parents=True, exist_ok=True)
        written = write_plots(result, folder)
        log.info("plots written: %d files in %s", len(written), folder)
    return 0
