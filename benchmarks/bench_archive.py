"""Archive speed: append one day of hourly data for 100 clocks to a one-year archive.

Target: the whole append (copy of the archive, writing the day, commit with fsync and rename)
under 2 s.  Prints the byte-copy time and the write time separately (medians of several
appends), the archive size, and for reference the time to write the year and to verify it.

    python benchmarks/bench_archive.py [--clocks 100] [--days 365] [--repeat 7] [--dir PATH]

Use --dir to measure on the disk the archives will live on (the default is a temporary folder,
which may be memory-backed and then understates the fsync cost).
"""

from __future__ import annotations

import argparse
import pathlib
import statistics
import sys
import tempfile
import time

import numpy as np

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parents[1]))

from ensemble.archive import ArchiveWriter, verify_archive  # noqa: E402
from ensemble.archive import schema  # noqa: E402

EXTRA = schema.FILTER_DATASETS


def day_block(rng, mjd0: float, n_epochs: int, n_clocks: int) -> dict:
    """Seeded synthetic rows (values of realistic size; nothing here is physics)."""
    state = np.full((n_epochs, n_clocks), schema.ACTIVE, dtype=np.int8)
    state[:, -1] = schema.MONITOR
    raw = rng.random((n_epochs, n_clocks)) + 0.1
    raw[:, -1] = 0.0
    return {"mjd": mjd0 + np.arange(n_epochs) / 24.0,
            "offset_s": rng.normal(0, 1e-9, (n_epochs, n_clocks)),
            "frequency": rng.normal(0, 1e-13, (n_epochs, n_clocks)),
            "drift_per_s": rng.normal(0, 1e-19, (n_epochs, n_clocks)),
            "weight": raw / raw.sum(axis=1, keepdims=True), "state": state,
            "filter/scale_uncertainty": rng.random(n_epochs) * 1e-9,
            "filter/innovation": rng.normal(0, 1, (n_epochs, n_clocks))}


def engine_state(rng, n_clocks: int) -> dict:
    """A saved state of the size a 3-state-per-clock filter keeps (covariance 3N x 3N)."""
    m = 3 * n_clocks
    return {"state_vector": rng.normal(size=m), "covariance": rng.normal(size=(m, m)),
            "q_per_clock": rng.random((n_clocks, 4)), "epochs_seen": 0,
            "clocks": {"window_d": 30.0}}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--clocks", type=int, default=100)
    parser.add_argument("--days", type=int, default=365)
    parser.add_argument("--repeat", type=int, default=7)
    parser.add_argument("--dir", type=pathlib.Path, default=None)
    args = parser.parse_args()
    rng = np.random.default_rng(20260101)
    clocks = [f"K{j:03d}" for j in range(args.clocks - 1)] + ["OUT"]
    with tempfile.TemporaryDirectory(dir=args.dir) as folder:
        path = pathlib.Path(folder) / "year.h5"
        attrs = {"config_toml": "[ensemble]\n", "input_sha256": "ab" * 32}
        t0 = time.perf_counter()
        with ArchiveWriter.create(path, clocks, attrs, extra_epoch_datasets=EXTRA) as w:
            for day in range(args.days):
                block = day_block(rng, 60676.0 + day, 24, args.clocks)
                w.append_epochs(block)
                w.append_events([{"mjd": float(block["mjd"][5]), "clock": clocks[day % 10],
                                  "kind": "outlier", "magnitude": 1e-9, "score": 5.0}])
                w.append_steering({"mjd": block["mjd"][:1], "frequency_correction": [1e-16],
                                   "phase_error": [1e-9]})
            w.write_state(engine_state(rng, args.clocks))
            w.add_run_record("year.csv")
        year_s = time.perf_counter() - t0
        year_bytes = path.stat().st_size
        t0 = time.perf_counter()
        problems = verify_archive(path)
        verify_s = time.perf_counter() - t0

        copies, writes, commits, totals = [], [], [], []
        for rep in range(args.repeat):
            day = args.days + rep
            block = day_block(rng, 60676.0 + day, 24, args.clocks)
            state = engine_state(rng, args.clocks)
            t0 = time.perf_counter()
            w = ArchiveWriter.open_for_append(path, {"input_sha256": "cd" * 32},
                                              extra_epoch_datasets=EXTRA)
            with w:
                w.append_epochs(block)
                w.append_events([{"mjd": float(block["mjd"][3]), "clock": clocks[0],
                                  "kind": "phase_step", "magnitude": 2e-9, "score": 8.0}])
                w.append_steering({"mjd": block["mjd"][:1], "frequency_correction": [-1e-16],
                                   "phase_error": [2e-9]})
                w.write_state(state)
                w.add_run_record(f"day{day}.csv")
            total = time.perf_counter() - t0
            copies.append(w.timings["copy_s"])
            commits.append(w.timings["commit_s"])
            writes.append(total - w.timings["copy_s"])
            totals.append(total)
        final_bytes = path.stat().st_size

    med = statistics.median
    print(f"archive: {args.days} days x 24 epochs, {args.clocks} clocks, "
          f"{len(EXTRA)} extra per-epoch datasets, state {3 * args.clocks}x{3 * args.clocks}")
    row_bytes = 16 + args.clocks * sum(np.dtype(d.dtype).itemsize for d in
                                       schema.CONTRACT_EPOCH_DATASETS[1:] + EXTRA if d.per_clock)
    def line(label: str, text: str) -> None:
        print(f"  {label:<29}{text}")

    line(f"size after {args.days} days", f"{year_bytes / 1e6:8.2f} MB")
    line(f"size after {args.repeat} daily appends", f"{final_bytes / 1e6:8.2f} MB "
          f"(+{(final_bytes - year_bytes) / args.repeat / 1e3:.1f} kB per day; one day of "
          f"rows is {24 * row_bytes / 1e3:.1f} kB, chunks are allocated ahead)")
    line(f"write the {args.days} days", f"{year_s:8.3f} s")
    line("verify the archive", f"{verify_s:8.3f} s  ({len(problems)} problems)")
    print(f"append one day (median of {args.repeat}):")
    line("byte copy of the archive", f"{med(copies):8.3f} s  "
          f"({year_bytes / 1e6 / med(copies):.0f} MB/s)")
    line("write the day + commit", f"{med(writes):8.3f} s  "
          f"(of which close, fsync, rename {med(commits):.3f} s)")
    line("total", f"{med(totals):8.3f} s  "
          f"(target 2 s: {med(totals) / 2.0:.1%} of it)")
    return 0 if med(totals) < 2.0 and not problems else 1


if __name__ == "__main__":
    sys.exit(main())
