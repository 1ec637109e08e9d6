"""Time to build the HTML report of an archive, by stage, median over repeats.

Stages: reading the archive with the header and verifier (``collect`` without the stability),
the N-cornered-hat stability, drawing the figures, and the whole ``write_report``.  Both wall
and CPU time are printed: on a shared machine the wall time also holds the waiting.

    python benchmarks/bench_report.py                      # the demo archive (made if needed)
    python benchmarks/bench_report.py lab.h5 big.h5 --repeats 3

A 100-clock, one-year archive for the second case:

    python -m ensemble simulate configs/scenarios/clocks100_1year.toml -o c100.csv
    python -m ensemble run c100.csv -o c100.h5
"""

from __future__ import annotations

import argparse
import pathlib
import statistics
import sys
import tempfile
import time

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parents[1]))

ROOT = pathlib.Path(__file__).resolve().parents[1]


def _timed(fn, *args, **kwargs):
    wall, cpu = time.perf_counter(), time.process_time()
    out = fn(*args, **kwargs)
    return out, time.perf_counter() - wall, time.process_time() - cpu


def _demo_archive(folder: pathlib.Path) -> pathlib.Path:
    from ensemble.pipeline import run_to_archive

    path = folder / "demo.h5"
    run_to_archive(ROOT / "demo_data" / "lab_demo.csv", path)
    return path


def bench(path: pathlib.Path, repeats: int) -> None:
    from ensemble.report import clockstability
    from ensemble.report.build import _make_pictures, write_report
    from ensemble.report.collect import collect

    rows: dict[str, list] = {"read + header + verifier": [], "stability (hat)": [],
                             "figures": [], "write_report (all)": []}
    n_images = 0
    for _ in range(repeats + 1):                 # the first round warms up (imports, caches)
        real = clockstability.clock_stability
        clockstability_times = []

        def timed_stability(*a, **k):
            out, w, c = _timed(real, *a, **k)
            clockstability_times.append((w, c))
            return out

        clockstability.clock_stability = timed_stability     # collect() looks it up per call
        try:
            data, w, c = _timed(collect, path)
        finally:
            clockstability.clock_stability = real
        sw, sc = clockstability_times[0]
        with tempfile.TemporaryDirectory() as tmp:
            pics, fw, fc = _timed(_make_pictures, data, pathlib.Path(tmp))
            n_images = sum(len(v) for k, v in pics.items() if k != "offset_pages")
            _, aw, ac = _timed(write_report, path, pathlib.Path(tmp) / "report")
        rows["read + header + verifier"].append((w - sw, c - sc))
        rows["stability (hat)"].append((sw, sc))
        rows["figures"].append((fw, fc))
        rows["write_report (all)"].append((aw, ac))
    rows = {k: v[1:] for k, v in rows.items()}
    print(f"{path}: {len(data.clocks)} clocks x {data.mjd.size} epochs, {n_images} images; "
          f"median of {repeats} runs")
    for name, values in rows.items():
        wall = statistics.median(v[0] for v in values)
        cpu = statistics.median(v[1] for v in values)
        print(f"  {name:<26} wall {wall:7.2f} s   cpu {cpu:7.2f} s")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("archives", nargs="*", type=pathlib.Path)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        archives = args.archives or [_demo_archive(pathlib.Path(tmp))]
        for path in archives:
            bench(path, args.repeats)


if __name__ == "__main__":
    main()
