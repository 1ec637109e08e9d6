"""``ensemble report``: an HTML page with PNG plots of an archive, for an operator."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  ensemble report lab.h5 -o lab_report
  ensemble report lab.h5 -o lab_report --days 30

The folder gets index.html and PNG images beside it (open index.html in any browser; it needs
no network).  It is written atomically: built beside DIR and moved into place when complete;
an existing DIR is replaced only if it is empty or holds an earlier report.

exit codes: 0 success; 2 bad input (not an archive, DIR a file or a folder of other files,
not writable, --days not > 0), one line on stderr; 1 internal error.
"""


def add_parser(sub, parents) -> None:
    p = sub.add_parser("report", parents=parents,
                       help="write an HTML report with plots of an archive",
                       description="Write a self-contained HTML report of an archive: span, "
                                   "standings, recent events, runs and the verifier's verdict; "
                                   "offsets with events and standings, weights, stability of "
                                   "the clocks and the scale, steering with its limits and "
                                   "cautions, and the clock assessment.",
                       epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("archive", metavar="ARCHIVE.h5", help="archive written by 'ensemble run'")
    p.add_argument("-o", "--output", metavar="DIR", required=True,
                   help="report folder (index.html and PNG images)")
    p.add_argument("--days", type=float, metavar="N",
                   help="show only the last N days (default: the whole archive)")
    p.set_defaults(func=main)


def main(args: argparse.Namespace) -> int:
    import logging
    import time

    from ..report.build import write_report

    log = logging.getLogger("ensemble")
    start = time.perf_counter()
    index = write_report(args.archive, args.output, days=args.days)
    images = sorted(p.name for p in index.parent.glob("*.png"))
    size = sum(p.stat().st_size for p in index.parent.iterdir() if p.is_file())
    log.info("report of %s: %d images, %.2f MB, %.1f s", args.archive, len(images), size / 1e6,
             time.perf_counter() - start)
    print(f"report written: {index}")
    return 0
