"""Speed of the simulator: 100 clocks x 1 year hourly, simulate and write the CSV.

Target: under 10 s in total (median of 3 runs).  Also times the 10-year five-clock scenario
once, and the truth file.  Run from the repository root:

    python benchmarks/bench_simulate.py
"""

from __future__ import annotations

import pathlib
import statistics
import sys
import tempfile
import time

ROOT = pathlib.Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from ensemble.simulate import Scenario, simulate  # noqa: E402

TARGET_S = 10.0


def run_once(scenario: Scenario, folder: pathlib.Path, truth: bool = False):
    t0 = time.perf_counter()
    sim = simulate(scenario)
    t1 = time.perf_counter()
    rows = sim.to_csv(folder / "bench.csv")
    t2 = time.perf_counter()
    t3 = t2
    if truth:
        sim.write_truth(folder / "bench.h5")
        t3 = time.perf_counter()
    size = (folder / "bench.csv").stat().st_size
    return t1 - t0, t2 - t1, t3 - t2, rows, size


def main() -> int:
    big = Scenario.from_toml(ROOT / "configs" / "scenarios" / "clocks100_1year.toml")
    long = Scenario.from_toml(ROOT / "configs" / "scenarios" / "five_clocks_10years.toml")
    with tempfile.TemporaryDirectory() as tmp:
        folder = pathlib.Path(tmp)
        runs = [run_once(big, folder) for _ in range(3)]
        sim_s = statistics.median(r[0] for r in runs)
        csv_s = statistics.median(r[1] for r in runs)
        total_s = statistics.median(r[0] + r[1] for r in runs)
        rows, size = runs[0][3], runs[0][4]
        print(f"100 clocks x {big.n_epochs} epochs (1 year hourly), median of 3 runs:")
        print(f"  simulate   {sim_s:7.3f} s")
        print(f"  write CSV  {csv_s:7.3f} s  ({rows} rows, {size / 1e6:.1f} MB, "
              f"{rows / csv_s / 1e6:.2f} M rows/s)")
        print(f"  total      {total_s:7.3f} s  = {total_s / TARGET_S:.2f} x the {TARGET_S:g} s "
              f"target ({'met' if total_s < TARGET_S else 'NOT met'})")
        s, c, h, rows, size = run_once(long, folder, truth=True)
        print(f"5 clocks x {long.n_epochs} epochs (10 years hourly), one run: simulate "
              f"{s:.3f} s, write CSV {c:.3f} s ({rows} rows, {size / 1e6:.1f} MB), "
              f"truth HDF5 {h:.3f} s")
    return 0 if total_s < TARGET_S else 1


if __name__ == "__main__":
    sys.exit(main())
