"""A run killed with SIGKILL leaves the previous archive intact; a rerun equals an
uninterrupted run (the archive layer's own kill tests are in test_archive_safety.py)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import h5py
import numpy as np
import pytest

from ensemble.archive import verify_archive
from ensemble.simulate import lab_scenario, simulate

from conftest import ROOT

CONFIG = "[ensemble]\nstartup_days = 2.0\n"


def _contents(path):
    out = {}
    with h5py.File(path, "r") as f:
        def visit(name, obj):
            if isinstance(obj, h5py.Dataset) and not name.startswith("provenance"):
                out[name] = obj[()]
        f.visititems(visit)
    return out


def _equal(a, b):
    assert sorted(a) == sorted(b)
    for k in a:
        x, y = a[k], b[k]
        if x.dtype.names:
            assert all(np.array_equal(x[f], y[f], equal_nan=x[f].dtype.kind == "f")
                       for f in x.dtype.names), k
        else:
            assert np.array_equal(x, y, equal_nan=x.dtype.kind == "f"), k


def _cli(*args, wait=True):
    cmd = [sys.executable, "-m", "ensemble", *map(str, args), "-q"]
    if wait:
        return subprocess.run(cmd, cwd=ROOT, capture_output=True, text=True, timeout=300)
    return subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)


@pytest.mark.slow
def test_killed_append_leaves_the_archive_and_a_rerun_completes(tmp_path):
    sim = simulate(lab_scenario({"hydrogen_maser": 2, "cesium_standard": 3}, 60.0, seed=2))
    full = tmp_path / "all.csv"
    sim.to_csv(full)
    lines = full.read_text().splitlines()
    cut = sim.mjd[24 * 5]
    first, second = tmp_path / "first.csv", tmp_path / "second.csv"
    first.write_text("\n".join([lines[0]] + [r for r in lines[1:] if float(r.split(",")[0]) < cut]))
    second.write_text("\n".join([lines[0]] + [r for r in lines[1:]
                                              if float(r.split(",")[0]) >= cut]))
    config = tmp_path / "lab.toml"
    config.write_text(CONFIG)
    archive = tmp_path / "lab.h5"
    assert _cli("run", first, "-o", archive, "--config", config).returncode == 0
    before = archive.read_bytes()
    rng = np.random.default_rng(7)
    for delay in rng.uniform(0.3, 3.0, size=5):
        proc = _cli("run", second, "--append", archive, wait=False)
        time.sleep(delay)
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()
        # the old archive, or (killed after the rename) the complete new one: never half
        assert verify_archive(archive) == []
        if archive.read_bytes() != before:
            with h5py.File(archive) as f:
                assert f["provenance"].shape == (2,)
            archive.write_bytes(before)   # undo for the next round
    done = _cli("run", second, "--append", archive)
    assert done.returncode == 0, done.stderr
    reference = tmp_path / "reference.h5"
    assert _cli("run", full, "-o", reference, "--config", config).returncode == 0
    _equal(_contents(reference), _contents(archive))
    leftovers = [p.name for p in tmp_path.iterdir() if ".tmp-" in p.name]
    assert leftovers == []
