"""Crash safety and the writer lock: SIGKILL at random moments never damages the archive.

A child process creates or appends to an archive and is killed with SIGKILL at a seeded random
point (before the lock, during the copy, after any block, during the commit).  Afterwards the
archive must be exactly the old file (same bytes) or, if the kill came after the rename, exactly
the complete new one; the lock must be free; a rerun must remove the stale temporary file and
give the same content (every attribute, every dataset's dtype, shape and bytes) as an
uninterrupted run.  (Cross-check: the uninterrupted run in this process is the reference.  The
files' bytes differ only in the timestamps HDF5 keeps in its superblock extension.)
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import textwrap
import time

import h5py
import numpy as np
import pytest

from ensemble.archive import ArchiveWriter, open_archive, verify_archive
from ensemble.archive.lock import ArchiveLock
from ensemble.errors import InputError

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

#: The writing program, run in a child process (and, for the reference, in this one).
CHILD = textwrap.dedent('''
    import sys
    import numpy as np
    from ensemble.archive import ArchiveWriter, schema

    CLOCKS = ["HM1", "HM2", "CS1", "CS2", "RB1", "OUT"]

    def block(rng, mjd0, n):
        n_c = len(CLOCKS)
        state = np.full((n, n_c), 2, dtype=np.int8)
        state[:, -1] = 5                       # the steered output: measured, never weighted
        raw = rng.random((n, n_c)) + 0.1
        raw[:, -1] = 0.0
        return {"mjd": mjd0 + np.arange(n) / 24.0,
                "offset_s": rng.normal(0, 1e-9, (n, n_c)),
                "frequency": rng.normal(0, 1e-13, (n, n_c)),
                "drift_per_s": rng.normal(0, 1e-19, (n, n_c)),
                "weight": raw / raw.sum(axis=1, keepdims=True), "state": state,
                "filter/innovation": rng.normal(0, 1, (n, n_c))}

    def run(path, mode, seed, n_blocks, rows, mark=lambda text: None):
        rng = np.random.default_rng(seed)
        mjd0 = 60676.0 + seed * 1000.0
        if mode == "create":
            w = ArchiveWriter.create(path, CLOCKS, {"config_toml": "seed = %d\\n" % seed,
                                     "input_sha256": "ab" * 32,
                                     "created_utc": "2026-01-01T00:00:00Z"},
                                     extra_epoch_datasets=(schema.FILTER_INNOVATION,))
        else:
            w = ArchiveWriter.open_for_append(path, {"input_sha256": "cd" * 32})
        with w:
            mark("open")
            if mode == "hold":
                sys.stdin.readline()
            for i in range(n_blocks):
                b = block(rng, mjd0 + i * rows / 24.0, rows)
                w.append_epochs(b)
                w.append_events([{"mjd": float(b["mjd"][1]), "clock": "CS1",
                                  "kind": "phase_step", "magnitude": 1e-9, "score": 6.0}])
                mark("b%d" % i)
            w.write_state({"covariance": rng.normal(size=(18, 18)), "epochs": n_blocks * rows})
            w.add_run_record("phase_%d.csv" % seed, time_utc="2026-01-02T00:00:00Z")
            mark("commit")
        mark("done")

    if __name__ == "__main__":
        def mark(text):
            sys.stdout.write(text + "\\n")
            sys.stdout.flush()
        mark("ready")
        run(sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4]), int(sys.argv[5]), mark)
''')

_ns: dict = {"__name__": "archive_child"}
exec(compile(CHILD, "archive_child", "exec"), _ns)
run_writer = _ns["run"]

N_BLOCKS, ROWS = 24, 128         # 3072 hourly epochs of 6 clocks: long enough to be hit mid-way


def start_child(path, mode, seed, n_blocks=N_BLOCKS, rows=ROWS):
    env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.Popen([sys.executable, "-c", CHILD, str(path), mode, str(seed),
                             str(n_blocks), str(rows)], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env, text=True,
                            cwd=ROOT)


def wait_for(proc, marker: str) -> list[str]:
    seen = []
    while True:
        line = proc.stdout.readline()
        if not line:
            raise AssertionError(f"child ended before '{marker}': {seen} {proc.stderr.read()}")
        seen.append(line.strip())
        if seen[-1] == marker:
            return seen


def temporaries(folder, name="lab.h5"):
    return sorted(p for p in os.listdir(folder) if p.startswith(f".{name}.tmp-"))


def content(path) -> dict:
    """Everything an archive holds: attributes, and dtype, shape and bytes of every dataset."""
    out = {}
    with h5py.File(path, "r") as f:
        def visit(name, obj):
            for key, value in obj.attrs.items():
                out[f"{name}@{key}"] = np.asarray(value).tobytes()
            if isinstance(obj, h5py.Dataset):
                out[name] = (str(obj.dtype), obj.shape, obj[()].tobytes())
        visit("/", f)
        f.visititems(visit)
    return out


def lock_is_free(path) -> bool:
    try:
        ArchiveLock(path).release()
    except InputError:
        return False
    return True


def test_sigkill_at_random_moments_never_damages_the_archive(tmp_path):
    base_dir, ref_dir = tmp_path / "base", tmp_path / "ref"
    base_dir.mkdir(), ref_dir.mkdir()
    # The archive before the run (a first run of 2 blocks) and the uninterrupted results.
    run_writer(base_dir / "lab.h5", "create", 1, 2, ROWS)
    base = (base_dir / "lab.h5").read_bytes()
    (ref_dir / "lab.h5").write_bytes(base)
    run_writer(ref_dir / "lab.h5", "append", 2, N_BLOCKS, ROWS)
    ref_append = content(ref_dir / "lab.h5")
    run_writer(ref_dir / "new.h5", "create", 3, N_BLOCKS, ROWS)
    ref_create = content(ref_dir / "new.h5")

    rnd = random.Random(20261201)
    work = tmp_path / "work"
    work.mkdir()
    path = work / "lab.h5"
    outcomes = {"old": 0, "new": 0, "stale temporary": 0}
    for trial in range(20):
        mode = "create" if trial % 5 == 4 else "append"
        seed = 3 if mode == "create" else 2
        if path.exists():
            path.unlink()
        if mode == "append":
            path.write_bytes(base)
        target = rnd.randint(-1, N_BLOCKS)           # -1: from the start; N_BLOCKS: at commit
        marker = "ready" if target < 0 else "commit" if target == N_BLOCKS else f"b{target}"
        proc = start_child(path, mode, seed)
        try:
            wait_for(proc, marker)
            time.sleep(rnd.uniform(0.0, 0.004))
            proc.send_signal(signal.SIGKILL)
        finally:
            proc.wait(timeout=30)
            proc.stdout.close(), proc.stderr.close(), proc.stdin.close()
        assert proc.returncode in (-signal.SIGKILL, 0)
        assert lock_is_free(path), f"trial {trial}: lock still held after the kill"
        reference = ref_create if mode == "create" else ref_append
        if mode == "append" and path.read_bytes() == base:
            outcomes["old"] += 1
        elif mode == "create" and not path.exists():
            outcomes["old"] += 1
        else:
            assert content(path) == reference, f"trial {trial}: archive neither old nor new"
            outcomes["new"] += 1
        if path.exists():
            assert verify_archive(path) == [], f"trial {trial}"
            with open_archive(path) as a:
                assert a.n_epochs in (2 * ROWS, (2 + N_BLOCKS) * ROWS, N_BLOCKS * ROWS)
        stale = temporaries(work)
        if stale:
            outcomes["stale temporary"] += 1
        if mode == "append" and path.read_bytes() == base and target >= 0:
            assert stale, f"trial {trial}: killed mid-write, a temporary file should remain"
        # The rerun: cleans up, completes, equals the uninterrupted run.
        if path.exists() and content(path) == reference:
            continue
        if mode == "create" and path.exists():
            path.unlink()
        run_writer(path, mode, seed, N_BLOCKS, ROWS)
        assert temporaries(work) == [], f"trial {trial}: the rerun left {temporaries(work)}"
        assert content(path) == reference, f"trial {trial}: rerun differs"
    # The kills landed mostly mid-write (that is what the test is for).
    assert outcomes["old"] >= 10 and outcomes["stale temporary"] >= 8, outcomes


def test_a_second_writer_is_refused_at_once_naming_the_holder(tmp_path):
    path = tmp_path / "lab.h5"
    run_writer(path, "create", 1, 1, 8)
    before = path.read_bytes()
    proc = start_child(path, "hold", 5, 1, 8)
    try:
        wait_for(proc, "open")
        t0 = time.perf_counter()
        with pytest.raises(InputError) as info:
            ArchiveWriter.open_for_append(path)
        assert time.perf_counter() - t0 < 5.0               # fails at once, never waits
        message = str(info.value)
        assert f"pid {proc.pid}" in message and "lab.h5.lock" in message
        assert "\n" not in message and message.startswith(str(path))
        with pytest.raises(InputError, match=f"pid {proc.pid}"):
            ArchiveWriter.create(path, ["A"], {"config_toml": "", "input_sha256": "0" * 64},
                                 overwrite=True)
        assert len(temporaries(tmp_path)) == 1                # the holder's work in progress
        proc.send_signal(signal.SIGKILL)                      # dies holding the lock
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stdout.close(), proc.stderr.close(), proc.stdin.close()
    assert path.read_bytes() == before
    with ArchiveWriter.open_for_append(path) as w:              # the kernel freed the lock
        assert temporaries(tmp_path) == [t for t in temporaries(tmp_path) if str(os.getpid()) in t]
        w.add_run_record("next.csv")
    assert temporaries(tmp_path) == []
    assert verify_archive(path) == []


def test_lock_within_one_process_and_release(tmp_path):
    path = tmp_path / "lab.h5"
    attrs = {"config_toml": "", "input_sha256": "0" * 64}
    first = ArchiveWriter.create(path, ["A"], attrs)
    with pytest.raises(InputError, match=f"being written by pid {os.getpid()} since"):
        ArchiveWriter.create(path, ["A"], attrs)
    first.abort()
    assert not path.exists() and temporaries(tmp_path) == []
    with ArchiveWriter.create(path, ["A"], attrs) as w:        # free again after abort
        w.add_run_record("a.csv")
    assert lock_is_free(path)


def test_an_exception_inside_the_writer_leaves_the_archive(tmp_path):
    path = tmp_path / "lab.h5"
    run_writer(path, "create", 1, 2, 8)
    before = path.read_bytes()
    with pytest.raises(RuntimeError, match="engine failed"):
        with ArchiveWriter.open_for_append(path) as w:
            w.add_run_record("x.csv")
            raise RuntimeError("engine failed")
    assert path.read_bytes() == before
    assert temporaries(tmp_path) == [] and lock_is_free(path)


def test_append_keeps_permissions_and_follows_a_symbolic_link(tmp_path):
    real = tmp_path / "data" / "lab-2026.h5"
    real.parent.mkdir()
    run_writer(real, "create", 1, 1, 8)
    os.chmod(real, 0o640)
    link = tmp_path / "current.h5"
    link.symlink_to(real)
    run_writer(link, "append", 2, 1, 8)
    assert link.is_symlink() and os.readlink(link) == str(real)
    assert (real.stat().st_mode & 0o777) == 0o640
    with open_archive(link) as a:
        assert a.n_epochs == 16
    assert (real.parent / "lab-2026.h5.lock").exists()
    assert not (tmp_path / "current.h5.lock").exists()
