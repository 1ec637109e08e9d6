"""Reading speed of the measurement CSV: one year of hourly epochs for 10 and 100 clocks.

Writes invented long-form and wide-form files (seeded) to a temporary folder, reads each a few
times with :func:`ensemble.io.csvread.read_measurements` and prints the median wall time and
the rows per second.  Target: the long form with 100 clocks x 8760 epochs (876 000 rows) well
under 5 s.

    python benchmarks/bench_intake.py [--repeat N]
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

from ensemble.io.csvread import read_measurements  # noqa: E402

EPOCHS = 8760                      # one year, hourly
MJD0 = 60676.0                     # 2025-01-01


def write_long(path: pathlib.Path, n_clocks: int, rng: np.random.Generator) -> int:
    """Long form, 6-decimal MJD, clock C000 the reference; a few cells left empty."""
    mjd = np.char.mod("%.6f", MJD0 + np.arange(EPOCHS) / 24)
    clocks = np.array([f"C{i:03d}" for i in range(n_clocks)])
    phase = np.char.mod("%.6e", rng.normal(0.0, 1e-7, (EPOCHS, n_clocks)))
    phase[:, 0] = "0"
    phase[rng.random(phase.shape) < 0.001] = ""
    rows = np.char.add(np.char.add(np.repeat(mjd, n_clocks), ","),
                       np.char.add(np.tile(clocks, EPOCHS), ",C000,"))
    rows = np.char.add(rows, phase.ravel())
    path.write_text("mjd,clock,reference,phase\n" + "\n".join(rows.tolist()) + "\n")
    return rows.size


def write_wide(path: pathlib.Path, n_clocks: int, rng: np.random.Generator) -> int:
    """Wide form, 6-decimal MJD, values against C000 (not a column)."""
    mjd = np.char.mod("%.6f", MJD0 + np.arange(EPOCHS) / 24)
    phase = np.char.mod("%.6e", rng.normal(0.0, 1e-7, (EPOCHS, n_clocks)))
    lines = [",".join(["mjd"] + [f"C{i:03d}" for i in range(1, n_clocks + 1)])]
    lines += [m + "," + ",".join(row) for m, row in zip(mjd.tolist(), phase.tolist())]
    path.write_text("\n".join(lines) + "\n")
    return EPOCHS


def median_time(path: pathlib.Path, repeat: int, reference: str | None) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        read_measurements(path, reference=reference)
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=5, help="reads per file (default 5)")
    args = parser.parse_args()
    rng = np.random.default_rng(20261201)
    with tempfile.TemporaryDirectory() as tmp:
        folder = pathlib.Path(tmp)
        results = []
        for form, writer, ref in (("long", write_long, None), ("wide", write_wide, "C000")):
            for n in (10, 100):
                path = folder / f"{form}_{n}.csv"
                rows = writer(path, n, rng)
                read_measurements(path, reference=ref)           # warm-up (imports, caches)
                t = median_time(path, args.repeat, ref)
                size_mb = path.stat().st_size / 1e6
                results.append((form, n, rows, size_mb, t))
        print(f"{'form':<5} {'clocks':>6} {'rows':>8} {'MB':>6} {'median s':>9} {'rows/s':>10}")
        for form, n, rows, size_mb, t in results:
            print(f"{form:<5} {n:>6d} {rows:>8d} {size_mb:>6.1f} {t:>9.3f} {rows / t:>10.3g}")
        long100 = next(r for r in results if r[:2] == ("long", 100))
        long10 = next(r for r in results if r[:2] == ("long", 10))
        print(f"long form 100 clocks / 10 clocks: time ratio {long100[4] / long10[4]:.2f} "
              f"for {long100[2] / long10[2]:.0f} x the rows; target < 5 s: "
              f"{'met' if long100[4] < 5 else 'NOT met'} ({long100[4]:.2f} s)")


if __name__ == "__main__":
    main()
