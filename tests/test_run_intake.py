"""``ensemble run`` on good and bad measurement files: exit codes, one-line errors, no output."""

from __future__ import annotations

import os
import pathlib
import re
import subprocess
import sys

import pytest

from ensemble import cli

from conftest import DATA_DIR, ROOT
from test_csvread import BAD

MALFORMED = DATA_DIR / "malformed"


def run(capsys, *argv):
    code = cli.main(["run", *map(str, argv)])
    out, err = capsys.readouterr()
    return code, out, err


def test_summary_of_the_long_example(capsys, tmp_path):
    code, out, err = run(capsys, DATA_DIR / "example_long.csv", "-o", tmp_path / "lab.h5")
    assert code == 0
    assert "clocks     4: CS1 HM1 HM2 RB1" in out
    assert "epochs     23 at tau0 = 3600 s (1 h); 1 of 24 grid slots missing" in out
    assert "2025-01-01T00:00:00Z to 2025-01-01T23:00:00Z" in out
    assert "reference  HM1 (epochs 1-13), HM2 (epochs 14-23); 1 change" in out
    assert re.search(r"RB1\s+22\s+95\.7 %", out)


def test_wide_example_writes_the_archive_and_refuses_to_overwrite(capsys, tmp_path):
    archive = tmp_path / "lab.h5"
    code, out, err = run(capsys, DATA_DIR / "example_wide.csv", "--reference", "HM1",
                         "-o", archive)
    assert code == 0
    assert out.splitlines()[-1] == f"archive written: {archive}"
    before = archive.read_bytes()
    code, out, err = run(capsys, DATA_DIR / "example_wide.csv", "--reference", "HM1",
                         "-o", archive)
    assert code == 2 and "the archive exists" in err and len(err.splitlines()) == 1
    assert archive.read_bytes() == before


@pytest.mark.parametrize("name, content, reference, regex, row, column", BAD,
                         ids=[b[0] for b in BAD])
def test_bad_input_through_the_cli(capsys, tmp_path, name, content, reference, regex, row,
                                   column):
    source = tmp_path / "m.csv"
    source.write_bytes(content if isinstance(content, bytes) else content.encode("utf-8"))
    archive = tmp_path / "out.h5"
    args = [source, "-o", archive] + (["--reference", reference] if reference else [])
    code, out, err = run(capsys, *args)
    assert code == 2
    assert out == ""
    lines = err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ")
    assert "Traceback" not in err
    assert re.search(regex, lines[0])
    assert lines[0].startswith(f"error: {source}:{row}: " if row is not None
                               else f"error: {source}")
    if column is not None:
        assert f"column '{column}'" in lines[0]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.csv"]


def test_missing_input_file(capsys, tmp_path):
    code, out, err = run(capsys, tmp_path / "nowhere.csv", "-o", tmp_path / "a.h5")
    assert code == 2 and "cannot read the file" in err and len(err.splitlines()) == 1
    code, out, err = run(capsys, tmp_path, "-o", tmp_path / "a.h5")
    assert code == 2 and "is a folder" in err


def test_subprocess_run_bad_file(tmp_path):
    archive = tmp_path / "keep.h5"
    archive.write_bytes(b"existing archive bytes")
    bad = MALFORMED / "phase_nan.csv"
    proc = subprocess.run([sys.executable, "-m", "ensemble", "run", str(bad), "-o", str(archive)],
                          cwd=ROOT, capture_output=True, text=True, timeout=120,
                          env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert proc.returncode == 2
    assert proc.stdout == ""
    assert proc.stderr.count("\n") == 1 and proc.stderr.startswith("error: ")
    assert "Traceback" not in proc.stderr
    assert f"{bad}:6: column 'phase': 'NaN' is not a finite number" in proc.stderr
    assert archive.read_bytes() == b"existing archive bytes"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["keep.h5"]


def _corpus_table() -> dict[str, str]:
    """file name -> expected message fragment, from the malformed-inputs table of the README."""
    text = (DATA_DIR / "README.md").read_text(encoding="utf-8")
    section = text.split("## Malformed inputs", 1)[1]
    rows = re.findall(r"^\| `([^`]+)` \| .+ \| (.+) \|$", section, flags=re.MULTILINE)
    return dict(rows)


CORPUS = sorted(p.name for p in MALFORMED.iterdir())


def test_corpus_is_complete_and_documented():
    table = _corpus_table()
    assert len(CORPUS) >= 30
    assert sorted(table) == CORPUS


@pytest.mark.parametrize("name", CORPUS)
def test_malformed_corpus(capsys, tmp_path, name):
    archive = tmp_path / "archive.h5"
    original = b"\x89HDF\r\n\x1a\n an existing archive that must not change"
    archive.write_bytes(original)
    ref = re.search(r"\.ref-([A-Za-z0-9_.\-]+)\.", name)
    args = [MALFORMED / name, "-o", archive] + (["--reference", ref.group(1)] if ref else [])
    code, out, err = run(capsys, *args)
    assert code == 2
    lines = err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), err
    assert "Traceback" not in err and out == ""
    assert _corpus_table()[name] in lines[0]
    assert archive.read_bytes() == original
    assert sorted(p.name for p in tmp_path.iterdir()) == ["archive.h5"]


def test_corpus_files_are_what_the_readme_says():
    # spot checks of the encodings (the generator is not kept)
    assert (MALFORMED / "empty.csv").read_bytes() == b""
    assert (MALFORMED / "utf16_bom.csv").read_bytes()[:2] == b"\xff\xfe"
    assert (MALFORMED / "gzip.csv.gz").read_bytes()[:2] == b"\x1f\x8b"
    assert pathlib.Path(MALFORMED / "binary_junk.bin").stat().st_size == 2048
