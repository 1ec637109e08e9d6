"""Assessment speed: ``ensemble assess --what-if`` on the demo archive.

Target: the whole assessment with the leave-one-out runs under 30 s on 2 cores.  Forms the
demo archive once (demo_data/lab_demo.csv with configs/demo.toml: 8 clocks, 2878 hourly
epochs), then times the
assessment without and with the what-if runs and prints the medians, the parts of one what-if
assessment (one ensemble run, the rest), and the machine's load average (other processes on a
shared machine slow every figure).

    python benchmarks/bench_assess.py [--repeat 3] [--workers 0] [--archive PATH]
"""

from __future__ import annotations

import argparse
import os
import pathlib
import statistics
import sys
import tempfile
import time

ROOT = pathlib.Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from ensemble.assess import AssessmentSettings, assess_archive  # noqa: E402
from ensemble.assess.core import read_archive  # noqa: E402
from ensemble.pipeline import form_time_scale, run_to_archive  # noqa: E402


def _timed(fn, repeat: int) -> list[float]:
    out = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t0)
    return out


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--workers", type=int, default=0, help="what-if processes (0: all cores)")
    parser.add_argument("--archive", type=pathlib.Path, default=None,
                        help="an existing archive (default: the demo, formed here)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        path = args.archive
        if path is None:
            path = pathlib.Path(tmp) / "demo.h5"
            t0 = time.perf_counter()
            run_to_archive(ROOT / "demo_data" / "lab_demo.csv", path,
                           config=ROOT / "configs" / "demo.toml")
            print(f"demo archive formed in {time.perf_counter() - t0:.2f} s")
        inputs = read_archive(path)
        settings = AssessmentSettings(what_if_workers=args.workers)
        load0 = os.getloadavg()[0]
        base = _timed(lambda: assess_archive(path, settings), args.repeat)
        full = _timed(lambda: assess_archive(path, settings, what_if=True), args.repeat)
        one = _timed(lambda: form_time_scale(inputs.measurements(), inputs.config, keep=True,
                                             steer=False), 1)[0]
        load1 = os.getloadavg()[0]
    n_clocks, n_epochs = len(inputs.clocks), inputs.mjd.size
    cores = os.cpu_count() or 1
    workers = args.workers or cores
    print(f"archive: {n_clocks} clocks, {n_epochs} epochs; {cores} cores, {workers} what-if "
          f"processes; load average {load0:.2f} before, {load1:.2f} after")
    print(f"assess (no what-if)   median {statistics.median(base):6.2f} s  "
          f"(runs: {', '.join(f'{t:.2f}' for t in base)})")
    print(f"assess --what-if      median {statistics.median(full):6.2f} s  "
          f"(runs: {', '.join(f'{t:.2f}' for t in full)})  target 30 s: "
          f"{100 * statistics.median(full) / 30.0:.0f} % of it")
    print(f"one ensemble run      {one:6.2f} s  ({n_clocks} leave-one-out runs / {workers} "
          f"processes ~ {n_clocks * one / workers:.1f} s of the what-if)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
