"""Speed and quality figures of the stability statistics (not a test; prints medians of 3 runs).

    python benchmarks/bench_stability.py            # speed + noise-identification table
    python benchmarks/bench_stability.py --speed    # speed only

Targets (2-core machine): overlapping Allan, modified Allan and overlapping Hadamard at all
octave factors of a 1e6-point phase series together < 2 s; total deviation (all octave
factors) < 5 s.  The speed ratio is measured against the double-loop definitions the tests use
(tests/test_deviations.py: brute_phase), timed on the same moderate input.
"""

from __future__ import annotations

import argparse
import pathlib
import statistics
import sys
import time

import numpy as np

ROOT = pathlib.Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from ensemble.stability import (averaging_factors, deviation, identify_noise,  # noqa: E402
                                overlapping_avar_hvar, stability_table)


def median_time(fn, repeat=3):
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def speed() -> None:
    rng = np.random.default_rng(20260101)
    n = 1_000_000
    x = np.cumsum(rng.standard_normal(n)) * 1e-12 + 1e-10 * rng.standard_normal(n)
    print(f"phase series: {n} points (white FM + white PM), octave factors")
    total_three = 0.0
    for stat in ("oadev", "mdev", "ohdev"):
        m = averaging_factors(n, stat, "octave")
        t = median_time(lambda: deviation(stat, x, 1.0, m))
        total_three += t
        print(f"  {stat:7s} {m.size:2d} factors   {t:7.3f} s")
    print(f"  oadev + mdev + ohdev          {total_three:7.3f} s   (target < 2 s)")
    m = averaging_factors(n, "totdev", "octave")
    t_tot = median_time(lambda: deviation("totdev", x, 1.0, m))
    print(f"  totdev  {m.size:2d} factors   {t_tot:7.3f} s   (target < 5 s)")
    t_tab = median_time(lambda: stability_table(x, 1.0, "oadev"), repeat=3)
    print(f"  stability_table(oadev): deviations + noise id + EDF + intervals {t_tab:7.3f} s")

    xs = np.cumsum(rng.standard_normal((100_000, 10)), axis=0)
    mf = averaging_factors(100_000, "ohdev", "octave")
    t_pairs = median_time(lambda: overlapping_avar_hvar(xs, 1.0, mf))
    print(f"  overlapping_avar_hvar: 10 series x 1e5 points, {mf.size} factors  {t_pairs:7.3f} s")

    # against the double-loop definitions, on the same moderate input
    from test_deviations import brute_phase

    n_small = 2000
    xsm = x[:n_small]
    print(f"\nagainst the double-loop definitions (tests/test_deviations.py), {n_small} points, "
          "octave factors:")
    for stat in ("oadev", "mdev", "ohdev", "totdev"):
        m = averaging_factors(n_small, stat, "octave")
        t_fast = median_time(lambda: deviation(stat, xsm, 1.0, m))
        t_ref = median_time(lambda: [brute_phase(stat, xsm, 1.0, int(k)) for k in m], repeat=1)
        # the reference costs O(N) per factor (O(N m) for mdev): scale to 1e6 points
        if stat == "mdev":
            work_small = sum((n_small - 3 * k) * k for k in m)
            mb = averaging_factors(n, stat, "octave")
            work_big = sum((n - 3 * k) * k for k in mb)
        else:
            work_small = m.size * n_small
            work_big = averaging_factors(n, stat, "octave").size * n
        est = t_ref * work_big / work_small
        print(f"  {stat:7s} fast {1e3 * t_fast:8.2f} ms   loops {1e3 * t_ref:9.1f} ms   "
              f"ratio {t_ref / t_fast:8.0f}   (loops at 1e6 points: ~{est:,.0f} s)")


def powerlaw_frequency(rng, n, alpha):
    d = -alpha / 2.0
    h = np.ones(n)
    for k in range(1, n):
        h[k] = h[k - 1] * (k - 1 + d) / k
    size = 1 << int(np.ceil(np.log2(2 * n)))
    return np.fft.irfft(np.fft.rfft(h, size) * np.fft.rfft(rng.standard_normal(n), size),
                        size)[:n]


def noise_id_quality(trials: int = 100) -> None:
    """Hit rates of the lag-1 and B1 methods by number of tau-samples and averaging factor."""
    from ensemble.stability import noiseid
    from ensemble.stability.deviations import prepare

    rng = np.random.default_rng(7)
    print(f"\nnoise identification hit rate, {trials} seeded Kasdin-Walter phase records per "
          "cell (lag-1 with the R(n) split of PM results / B1 with R(n)):")
    print("   m  samples    WPM        FPM        WFM        FFM        RWFM")
    saved = noiseid.LAG1_MIN_SAMPLES
    try:
        for m in (1, 4, 16):
            for n_samp in (10, 20, 30, 50, 100):
                cells = []
                for alpha in (2, 1, 0, -1, -2):
                    hits = {"lag1": 0, "b1": 0}
                    for _ in range(trials):
                        y = powerlaw_frequency(rng, n_samp * m, alpha)
                        x = np.concatenate([[0.0], np.cumsum(y)])
                        series = prepare(x, 1.0, "phase")
                        for method, threshold in (("lag1", 1), ("b1", 10 ** 9)):
                            noiseid.LAG1_MIN_SAMPLES = threshold
                            est = noiseid.identify_prepared(series, m, 1.0, "phase", "oadev")
                            hits[method] += est.alpha == alpha
                    cells.append(f"{hits['lag1'] / trials:4.2f}/{hits['b1'] / trials:4.2f}")
                print(f"  {m:2d}  {n_samp:5d}    " + "  ".join(cells))
    finally:
        noiseid.LAG1_MIN_SAMPLES = saved
    y = powerlaw_frequency(rng, 4096, -1)
    est = identify_noise(y, 1.0, 1, data="frequency")
    print(f"  (flicker FM, 4096 samples, m = 1: alpha = {est.alpha}, raw {est.estimate:.2f})")


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--speed", action="store_true", help="speed figures only")
    a = ap.parse_args()
    speed()
    if not a.speed:
        noise_id_quality()
