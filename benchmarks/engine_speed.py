"""Speed part of the engine benchmark (run through ``bench_engine.py --part speed``).

Every measurement runs in a fresh subprocess (``python engine_speed.py --job JSON``), so that
peak memory is that of one job and no job inherits another's caches.  Peak memory is the resident
high-water mark VmHWM of /proc/self/status, reset just before the measured call by writing "5"
to /proc/self/clear_refs (Linux); resource.getrusage ru_maxrss where that is not available.

BLAS threads.  numpy's OpenBLAS starts one thread per core.  The engine's matrices are small
(up to a few hundred rows), and on a shared two-core machine a second BLAS thread that has to
wait for a busy core slows every product down; the pipeline therefore limits BLAS to one thread
during its epoch loop (threadpoolctl, ensemble/pipeline.py).  The per-epoch timings here call
TimeScaleEngine.step directly: they run with the thread setting of the benchmark
(``--blas-threads``, default 1), and once at 100 clocks with the environment's default threading
to show what the pipeline's limit saves.

Targets: 10 clocks x 1 year hourly CSV to archive < 3 s; 100 clocks x 1 year < 60 s with peak
memory < 2 GB and state memory independent of the span (half a year and a year, keep=False);
time per epoch for 10, 30, 100, 300 clocks and its growth exponent; steering adds < 10 % to
form_time_scale on the 100-clock year; the structured Joseph update against filterpy.
"""

from __future__ import annotations

import argparse
import json
import os
import pathlib
import statistics
import subprocess
import sys
import tempfile
import time

HERE = pathlib.Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

DAY = 86400.0
EPOCHS_YEAR = 8760


# ================================================================= inside a job (subprocess)
def _hwm_reset() -> bool:
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def _mem_mb(field: str = "VmHWM") -> float:
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith(field + ":"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    import resource
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _simulation(job):
    from engine_runs import load_scenario
    from ensemble.simulate import lab_scenario, simulate

    if job.get("scenario"):
        return simulate(load_scenario(job["scenario"], job.get("duration")))
    return simulate(lab_scenario(job["lab"], job["duration"], seed=job.get("seed", 0)))


def job_archive(job) -> dict:
    """CSV in to archive out with run_to_archive, repeated; peak memory of each run."""
    import ensemble.pipeline as pipeline
    from ensemble.io.csvread import read_measurements

    parts = {"_start_engine": 0.0, "_run_epochs": 0.0}
    for name in parts:                       # time the start-up and the epoch loop inside
        original = getattr(pipeline, name)

        def timed(*args, _original=original, _name=name, **kwargs):
            t0 = time.perf_counter()
            value = _original(*args, **kwargs)
            parts[_name] += time.perf_counter() - t0
            return value

        setattr(pipeline, name, timed)
    sim = _simulation(job)
    n_epochs, n_clocks = sim.n_epochs, sim.n_clocks
    with tempfile.TemporaryDirectory(dir=job.get("tmpdir")) as tmp:
        csv = pathlib.Path(tmp) / "lab.csv"
        rows = sim.to_csv(csv)
        del sim
        t0 = time.perf_counter()
        read_measurements(csv)
        t_read = time.perf_counter() - t0
        times, cpu, peaks, events = [], [], [], 0
        for r in range(job.get("repeats", 1)):
            out = pathlib.Path(tmp) / f"run{r}.h5"
            _hwm_reset()
            t0, c0 = time.perf_counter(), time.process_time()
            res = pipeline.run_to_archive(csv, out, overwrite=True)
            times.append(time.perf_counter() - t0)
            cpu.append(time.process_time() - c0)
            peaks.append(_mem_mb())
            events = len(res.events)
            size = out.stat().st_size
            out.unlink()
            del res
    reps = job.get("repeats", 1)
    return {"times": times, "cpu": cpu, "peak_mb": max(peaks),
            "startup_s": parts["_start_engine"] / reps, "loop_s": parts["_run_epochs"] / reps, "rows": rows, "epochs": n_epochs,
            "clocks": n_clocks, "read_s": t_read, "events": events, "archive_mb": size / 2 ** 20}


def job_form(job) -> dict:
    """form_time_scale with keep=False (no sink): time, steering's share, memory during the run."""
    import gc

    import ensemble.pipeline as pipeline

    sim = _simulation(job)
    meas = sim.measurements()
    del sim
    gc.collect()
    steer_time = [0.0]
    if job["steer"]:
        for name in ("step", "take"):          # every call the steering adds to the epoch loop
            original = getattr(pipeline._Steering, name)

            def timed(self, *args, _original=original, **kwargs):
                t0 = time.perf_counter()
                value = _original(self, *args, **kwargs)
                steer_time[0] += time.perf_counter() - t0
                return value

            setattr(pipeline._Steering, name, timed)
    rss_before = _mem_mb("VmRSS")
    reset = _hwm_reset()
    t0, c0 = time.perf_counter(), time.process_time()
    res = pipeline.form_time_scale(meas, keep=False, steer=job["steer"])
    elapsed, cpu = time.perf_counter() - t0, time.process_time() - c0
    return {"time": elapsed, "cpu": cpu, "peak_mb": _mem_mb(), "rss_before_mb": rss_before,
            "hwm_reset": reset, "steer_s": steer_time[0], "epochs": meas.n_epochs,
            "clocks": meas.n_clocks, "events": len(res.events),
            "steering_rows": len(next(iter(res.steering.values()))) if res.steering else 0}


def job_per_epoch(job) -> dict:
    """Time of TimeScaleEngine.step per epoch after the start-up (median over epochs)."""
    from engine_runs import build_engine

    sim = _simulation(job)
    meas = sim.measurements()
    engine = build_engine(meas)
    skip, limit = job["skip"], job["skip"] + job["timed"]
    times = []
    for k in range(min(meas.n_epochs, limit)):
        t0 = time.perf_counter()
        engine.step(float(meas.elapsed_s[k]), float(meas.mjd[k]), meas.phase_s[k],
                    int(meas.reference[k]))
        if k >= skip:
            times.append(time.perf_counter() - t0)
    return {"median_s": statistics.median(times), "mean_s": statistics.fmean(times),
            "timed": len(times), "clocks": meas.n_clocks}


def _update_case(n_clocks: int, rng):
    """An EnsembleFilter of n clocks after some epochs, and the dense matrices of one step."""
    import numpy as np

    from ensemble.engine.kalman import EnsembleFilter
    from ensemble.model import ClockNoise, process_noise, transition_matrix

    f = EnsembleFilter(n_clocks)
    for i in range(n_clocks):
        q1 = 1e-26 if i % 10 == 0 else 1e-22
        f.set_noise(i, q1, 1e-34, 1e-50, 4e-24)
        f.activate(i, np.array([rng.normal(0, 1e-9), rng.normal(0, 1e-13), 0.0]),
                   np.diag([4e-24, 1e-26, 1e-40]))
    ref = 0
    clocks = np.arange(1, n_clocks)
    for _ in range(20):
        f.predict(3600.0)
        f.update(rng.normal(0, 1e-9, clocks.size), clocks, ref)
    t = 3600.0 / DAY
    phi = np.kron(np.eye(n_clocks), transition_matrix(t))
    q = np.zeros((3 * n_clocks, 3 * n_clocks))
    for i in range(n_clocks):
        q1, q2, q3 = f.q[i]
        q[3 * i:3 * i + 3, 3 * i:3 * i + 3] = process_noise(ClockNoise(q1, q2, q3), t)
    h = np.zeros((clocks.size, 3 * n_clocks))
    h[np.arange(clocks.size), 3 * clocks] = 1.0
    h[:, 3 * ref] = -1.0
    r = np.diag(f.r[clocks])
    return f, phi, q, h, r, clocks, ref


def job_update(job) -> dict:
    """Structured Joseph update vs filterpy (update alone, and predict + update), per N."""
    import copy

    import numpy as np
    from filterpy.kalman import KalmanFilter

    from ensemble.engine.kalman import reference_filterpy_step

    rng = np.random.default_rng(4242)
    out = {}
    reps = job["repeats"]
    for n in job["sizes"]:
        f, phi, q, h, r, clocks, ref = _update_case(n, rng)
        z = rng.normal(0, 1e-9, clocks.size)
        # agreement of one predict + update (the tests do this to 1e-8; a sanity check here)
        g = copy.deepcopy(f)
        x_ref, p_ref = reference_filterpy_step(g.x, g.P, phi, q, z * 1e9, h, r)
        g.predict(3600.0)
        g.update(z, clocks, ref)
        agree = float(np.max(np.abs(g.P - p_ref)) / np.max(np.abs(p_ref)))
        ours, theirs, ours_pu, theirs_pu = [], [], [], []
        for _ in range(reps):
            g = copy.deepcopy(f)
            t0 = time.perf_counter()
            g.update(z, clocks, ref)
            ours.append(time.perf_counter() - t0)
            kf = KalmanFilter(dim_x=3 * n, dim_z=clocks.size)
            kf.x, kf.P = f.x.copy(), f.P.copy()
            t0 = time.perf_counter()
            kf.update(z * 1e9, R=r, H=h)
            theirs.append(time.perf_counter() - t0)
            g = copy.deepcopy(f)
            t0 = time.perf_counter()
            g.predict(3600.0)
            g.update(z, clocks, ref)
            ours_pu.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            reference_filterpy_step(f.x, f.P, phi, q, z * 1e9, h, r)
            theirs_pu.append(time.perf_counter() - t0)
        out[str(n)] = {"ours": statistics.median(ours), "filterpy": statistics.median(theirs),
                       "ours_pu": statistics.median(ours_pu),
                       "filterpy_pu": statistics.median(theirs_pu), "agree": agree}
    return out


JOBS = {"archive": job_archive, "form": job_form, "per_epoch": job_per_epoch,
        "update": job_update}


# ============================================================================ the parent
def run_job(job: dict, env: dict | None = None) -> dict:
    """Run one job in a fresh interpreter and return its result."""
    cmd = [sys.executable, str(pathlib.Path(__file__).resolve()), "--job", json.dumps(job)]
    proc = subprocess.run(cmd, capture_output=True, text=True, env=env)
    if proc.returncode != 0:
        raise RuntimeError(f"job {job['kind']} failed:\n{proc.stderr[-3000:]}")
    for line in proc.stdout.splitlines()[::-1]:
        if line.startswith("RESULT "):
            return json.loads(line[7:])
    raise RuntimeError(f"job {job['kind']} printed no result:\n{proc.stdout[-2000:]}")


#: The ten clocks of the 10-clock year (lab_scenario, white PM 2 ps, seed 1104).
LAB10 = {"hydrogen_maser": 3, "cesium_standard": 3, "cesium_high_performance": 2, "rubidium": 2}
#: Mixture of clock types for the per-epoch timing (that of clocks100_1year.toml).
MIX = (("hydrogen_maser", 0.10), ("cesium_standard", 0.50),
       ("cesium_high_performance", 0.25), ("rubidium", 0.15))


def _mix(n: int) -> dict:
    counts = {k: max(1, int(round(f * n))) for k, f in MIX}
    counts["cesium_standard"] += n - sum(counts.values())
    return counts


def _list(results, key: str, digits: int = 1) -> str:
    return ", ".join(f"{r[key]:.{digits}f}" for r in results)


def part_speed(rep, quick: bool) -> None:
    import numpy as np

    from engine_runs import blas_threads

    print(f"\n## speed{' (quick)' if quick else ''}: each figure from a fresh subprocess; BLAS "
          f"threads {blas_threads()}; load average "
          f"{', '.join(f'{v:.2f}' for v in os.getloadavg())}; wall-clock times decide the "
          f"targets, the process's CPU time is shown beside them (the machine is shared)")
    # ------------------------------------------------------------ 10 clocks, CSV to archive
    reps = 1 if quick else 5          # five runs: the shared machine's speed varies by +-20 %
    a10 = run_job({"kind": "archive", "lab": LAB10, "duration": 365.0, "seed": 1104,
                   "repeats": reps})
    t10, c10 = statistics.median(a10["times"]), statistics.median(a10["cpu"])
    walls = ", ".join(f"{t:.2f}" for t in a10["times"])
    print(f"10 clocks x {a10['epochs']} epochs (lab_scenario {LAB10}, seed 1104), CSV "
          f"({a10['rows']} rows) to archive ({a10['archive_mb']:.1f} MB): wall {walls}"
          f" s, CPU {', '.join(f'{t:.2f}' for t in a10['cpu'])} s; reading the CSV alone "
          f"{a10['read_s']:.2f} s; per run on average: start-up estimation "
          f"{a10['startup_s']:.2f} s, epoch loop (engine, steering, archive blocks) "
          f"{a10['loop_s']:.2f} s; peak memory {a10['peak_mb']:.0f} MB")
    rep.target("speed", f"10 clocks x 1 year CSV to archive: median {t10:.2f} s wall "
               f"({c10:.2f} s CPU) of {reps} runs, {t10 / a10['epochs'] * 1e3:.2f} ms per epoch "
               f"(target < 3 s)", t10 < 3.0)
    # ------------------------------------------------------------ 100 clocks
    days = 30.0 if quick else None
    factor = 1.0 if days is None else EPOCHS_YEAR / (days * 24)
    a100 = run_job({"kind": "archive", "scenario": "clocks100_1year", "duration": days})
    t100, c100 = a100["times"][0] * factor, a100["cpu"][0] * factor
    label = "" if days is None else f" (quick: {days:g} d measured, x {factor:.1f})"
    print(f"100 clocks x {a100['epochs']} epochs (clocks100_1year), CSV ({a100['rows']} rows) to "
          f"archive: wall {a100['times'][0]:.1f} s, CPU {a100['cpu'][0]:.1f} s; reading "
          f"{a100['read_s']:.2f} s; start-up estimation {a100['startup_s']:.1f} s, epoch loop "
          f"{a100['loop_s']:.1f} s; {a100['events']} events detected")
    rep.target("speed", f"100 clocks x 1 year CSV to archive: {t100:.1f} s wall ({c100:.1f} s "
               f"CPU){label} (target < 60 s)", t100 < 60.0)
    rep.target("speed", f"100 clocks x 1 year peak memory (VmHWM of the run) "
               f"{a100['peak_mb']:.0f} MB (target < 2048 MB)", a100["peak_mb"] < 2048)
    full_days = days if days is not None else 365.0
    runs = {False: [], True: []}
    for _ in range(2):                      # alternated, so slow phases of the machine hit both
        for steer in (False, True):
            runs[steer].append(run_job({"kind": "form", "scenario": "clocks100_1year",
                                        "duration": days, "steer": steer}))
    half = run_job({"kind": "form", "scenario": "clocks100_1year",
                    "duration": full_days / 2, "steer": False})
    off = runs[False][0]
    cpu_off = min(r["cpu"] for r in runs[False])
    cpu_on = min(r["cpu"] for r in runs[True])
    wall_off = min(r["time"] for r in runs[False])
    wall_on = min(r["time"] for r in runs[True])
    inside = min(r["steer_s"] for r in runs[True])
    print("form_time_scale, 100 clocks, keep=False, two runs each, alternated: steer=False "
          f"wall {_list(runs[False], 'time')} s, CPU {_list(runs[False], 'cpu')} s; steer=True "
          f"wall {_list(runs[True], 'time')} s, CPU {_list(runs[True], 'cpu')} s; inside the "
          f"steering calls {_list(runs[True], 'steer_s', 2)} s "
          f"({runs[True][0]['steering_rows']} rows)")
    extra_cpu = cpu_on / cpu_off - 1.0
    extra_wall = wall_on / wall_off - 1.0
    share = inside / (wall_on - inside)
    rep.target("speed", f"steering adds {100 * extra_cpu:+.1f} % CPU ({100 * extra_wall:+.1f} % "
               f"wall; fastest of two runs each) to form_time_scale on the 100-clock "
               f"{'year' if days is None else f'{days:g} d'}; the steering calls themselves take "
               f"{100 * share:.2f} % of the rest of the run (target < 10 %, judged on CPU time)",
               extra_cpu < 0.10)
    growth_half = half["peak_mb"] - half["rss_before_mb"]
    growth_full = off["peak_mb"] - off["rss_before_mb"]
    print(f"memory with keep=False (RSS before the run -> peak during it): "
          f"{half['epochs']} epochs {half['rss_before_mb']:.0f} -> {half['peak_mb']:.0f} MB "
          f"(+{growth_half:.0f}); {off['epochs']} epochs {off['rss_before_mb']:.0f} -> "
          f"{off['peak_mb']:.0f} MB (+{growth_full:.0f}); the measurements themselves "
          f"(T x N float64, held before the run) grow with the span")
    same = abs(growth_full - growth_half) <= max(0.1 * growth_half, 20.0)
    rep.target("speed", f"state memory independent of the span: growth during the run "
               f"{growth_half:.0f} MB (half span) vs {growth_full:.0f} MB (full span) (equal "
               f"within 10 % or 20 MB)", same)
    # ------------------------------------------------------------ time per epoch vs clocks
    sizes = (10, 30, 100, 300)
    timed = {10: 200, 30: 200, 100: 150, 300: 60} if not quick else \
        {10: 60, 30: 60, 100: 40, 300: 15}
    per = {n: run_job({"kind": "per_epoch", "lab": _mix(n), "duration": 11.0, "seed": 7,
                       "skip": 24, "timed": timed[n]}) for n in sizes}
    default_env = {k: v for k, v in os.environ.items()
                   if k not in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")}
    per_default = run_job({"kind": "per_epoch", "lab": _mix(100), "duration": 11.0, "seed": 7,
                           "skip": 24, "timed": timed[100]}, env=default_env)
    ln_n = np.log(np.array(sizes, dtype=float))
    ln_t = np.log(np.array([per[n]["median_s"] for n in sizes]))
    slope = float(np.polyfit(ln_n, ln_t, 1)[0])
    print("time per epoch (TimeScaleEngine.step after the start-up, epochs 24 on; median):")
    for k, n in enumerate(sizes):
        local = "" if k == 0 else \
            f"  local exponent {(ln_t[k] - ln_t[k - 1]) / (ln_n[k] - ln_n[k - 1]):.2f}"
        print(f"  {n:4d} clocks: {1e3 * per[n]['median_s']:8.2f} ms (mean "
              f"{1e3 * per[n]['mean_s']:.2f}, {per[n]['timed']} epochs){local}")
    print(f"  100 clocks with the environment's default BLAS threading: "
          f"{1e3 * per_default['median_s']:.2f} ms (x "
          f"{per_default['median_s'] / per[100]['median_s']:.1f} the single-thread time)")
    rep.info("speed", f"time per epoch grows as N^{slope:.2f} (least-squares fit over 10, 30, "
             f"100, 300 clocks: {1e3 * per[10]['median_s']:.2f}, {1e3 * per[30]['median_s']:.2f},"
             f" {1e3 * per[100]['median_s']:.2f}, {1e3 * per[300]['median_s']:.1f} ms)")
    # ------------------------------------------------------------ Joseph update vs filterpy
    upd = run_job({"kind": "update", "sizes": [10, 30, 100], "repeats": 7 if quick else 25})
    print("measurement update of N - 1 differences (median of repeats): structured Joseph "
          "(EnsembleFilter.update) vs filterpy KalmanFilter.update; predict + update vs "
          "reference_filterpy_step (dense, a new KalmanFilter each call)")
    for n, v in upd.items():
        print(f"  {n:>3} clocks: update {1e3 * v['ours']:7.3f} ms vs {1e3 * v['filterpy']:7.3f} "
              f"ms (filterpy / ours {v['filterpy'] / v['ours']:.2f});  predict + update "
              f"{1e3 * v['ours_pu']:7.3f} ms vs {1e3 * v['filterpy_pu']:7.3f} ms "
              f"({v['filterpy_pu'] / v['ours_pu']:.2f}); covariances agree to {v['agree']:.1e}")
    rep.info("speed", "structured Joseph update vs filterpy KalmanFilter.update, time ratio "
             "filterpy / ours: " + ", ".join(f"{n} clocks {v['filterpy'] / v['ours']:.2f}"
                                             for n, v in upd.items()))


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="one job of the engine speed benchmark")
    parser.add_argument("--job", required=True, help="JSON job description")
    args = parser.parse_args(argv)
    job = json.loads(args.job)
    result = JOBS[job["kind"]](job)
    print("RESULT " + json.dumps(result), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

