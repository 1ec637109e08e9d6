"""``ensemble report``: content, self-containedness, atomic writing, bad input, rendering."""

from __future__ import annotations

import html.parser
import os
import pathlib
import re
import shutil
import subprocess
import tempfile

import numpy as np
import pytest

from ensemble import cli
from ensemble.report import write_report
from ensemble.report import figures_time
from ensemble.report.build import png_size
from ensemble.report.sections import SECTIONS

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


# ------------------------------------------------------------------------------ fixtures
SCENARIO = {
    "simulation": {"seed": 4242, "duration_days": 12, "tau0_s": 3600.0, "reference": "H1"},
    "clocks": [{"name": "H1", "type": "hydrogen_maser"},
               {"name": "H2", "type": "hydrogen_maser"},
               {"name": "C1", "type": "cesium_high_performance"},
               {"name": "C2", "type": "cesium_standard"},
               {"name": "R1", "type": "rubidium", "drift_per_day": 1e-13}],
    "anomalies": [{"kind": "phase_step", "clock": "C2", "day": 7.5, "size_s": 2e-8},
                  {"kind": "outlier", "clock": "C1", "day": 9.25, "size_s": 3e-8}],
}


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    """A small simulated laboratory run through the pipeline: (folder, archive path)."""
    from ensemble.pipeline import run_to_archive
    from ensemble.simulate import Scenario, simulate

    folder = tmp_path_factory.mktemp("lab")
    sim = simulate(Scenario.from_dict(SCENARIO))
    sim.to_csv(folder / "lab.csv")
    run_to_archive(folder / "lab.csv", folder / "lab.h5")
    return folder, folder / "lab.h5"


@pytest.fixture(scope="module")
def report(lab):
    """The report of the small laboratory: (folder, index.html text)."""
    folder, archive = lab
    index = write_report(archive, folder / "report")
    return index.parent, index.read_text(encoding="utf-8")


class _Page(html.parser.HTMLParser):
    """Collects tags with their attributes, section ids and the text of a page."""

    def __init__(self):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def parse(text: str) -> _Page:
    page = _Page()
    page.feed(text)
    return page


def tree_bytes(folder: pathlib.Path) -> dict:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


def leftovers(parent: pathlib.Path, name: str) -> list[str]:
    return sorted(p.name for p in parent.iterdir() if p.name.startswith(f".{name}."))


# ------------------------------------------------------------------------------ content
def test_every_section_is_present(report):
    folder, text = report
    page = parse(text)
    ids = {a.get("id") for _, a in page.tags if a.get("id")}
    for anchor, title in SECTIONS:
        assert anchor in ids
        assert f">{title}</h2>" in text
    words = " ".join(page.text)
    for needle in ("archive conforms to format 1", "Cautions", "clock \u2212 scale",
                   "scale (estimate)", "lab.csv", "phase_step", "outlier"):
        assert needle in words, needle
    for clock in ("H1", "H2", "C1", "C2", "R1"):
        assert f"<td>{clock}</td>" in text


def test_every_image_exists_and_is_a_sensible_png(report):
    folder, text = report
    srcs = [a["src"] for tag, a in parse(text).tags if tag == "img"]
    # offsets, weights, stability, steering
    assert len(srcs) == 4
    from matplotlib.image import imread
    for src in srcs:
        path = folder / src
        assert path.is_file(), src
        assert path.read_bytes()[:8] == PNG_SIGNATURE
        width, height = png_size(path)
        assert 600 <= width <= 2000 and 250 <= height <= 4000, (src, width, height)
        assert 5_000 < path.stat().st_size < 3_000_000
        pixels = imread(path)                  # decodes the whole file
        assert pixels.shape[:2] == (height, width)
        assert float(np.std(pixels[..., :3])) > 0.02     # not a blank image
    assert sorted(p.name for p in folder.iterdir()) == sorted(srcs + ["index.html"])


def test_the_page_refers_to_nothing_outside_its_folder(report):
    folder, text = report
    page = parse(text)
    tags = {tag for tag, _ in page.tags}
    assert not tags & {"script", "link", "iframe", "object", "embed", "base"}
    for tag, attrs in page.tags:
        for key in ("src", "href", "srcset", "action", "data"):
            value = attrs.get(key)
            if value is None:
                continue
            assert value.startswith("#") or (folder / value).is_file(), (tag, key, value)
    lowered = text.lower()
    assert "url(" not in lowered and "@import" not in lowered and "@font-face" not in lowered
    assert not re.search(r"(https?:|//[a-z])", lowered.replace("http-equiv", ""))


def test_days_limits_the_time_plots(lab, capsys, tmp_path):
    from ensemble import open_archive
    from ensemble.report.collect import collect

    folder, archive = lab
    with open_archive(archive) as a:
        last = a.mjd[-1]
    data = collect(archive, days=3)
    assert data.mjd[0] >= last - 3 and data.mjd[-1] == last
    assert data.mjd.size == 3 * 24 + 1            # hourly epochs over the last 3 days, inclusive
    assert data.offset_s.shape == (data.mjd.size, 5) and data.steering["mjd"][0] >= last - 3
    assert len(data.window_events) == 1            # the outlier on day 9.25; the step was at 7.5
    code = cli.main(["report", str(archive), "-o", str(tmp_path / "rep"), "--days", "3"])
    out, err = capsys.readouterr()
    assert code == 0
    assert out == f"report written: {tmp_path / 'rep' / 'index.html'}\n"
    assert "the last 3 days" in (tmp_path / "rep" / "index.html").read_text(encoding="utf-8")


def _no_assessment_api(monkeypatch):
    import ensemble.assess

    monkeypatch.delattr(ensemble.assess, "assess_archive", raising=False)


def test_without_an_assessment_a_notice_is_shown(lab, monkeypatch):
    from types import SimpleNamespace

    from ensemble import open_archive
    from ensemble.report.assessment import NOT_ASSESSED, assessment_view
    from ensemble.report.sections import assessment

    folder, archive = lab
    _no_assessment_api(monkeypatch)
    with open_archive(archive) as a:
        view = assessment_view(a, archive)
    assert view.source == "none" and view.notice == NOT_ASSESSED
    text = assessment(SimpleNamespace(assessment=view))
    assert "not assessed yet: run &#x27;ensemble assess ARCHIVE.h5&#x27;" in text


def test_the_assessment_api_is_called_when_the_archive_has_none(lab, monkeypatch):
    import ensemble.assess
    from ensemble import open_archive
    from ensemble.report.assessment import assessment_view

    folder, archive = lab
    calls = []

    def fake(path, write=True):
        calls.append((path, write))
        return [{"clock": "H1", "verdict": "watch", "reasons": ["drift grew"]}]

    monkeypatch.setattr(ensemble.assess, "assess_archive", fake, raising=False)
    with open_archive(archive) as a:
        view = assessment_view(a, archive)
    assert calls == [(str(archive), False)]           # asked not to write
    assert view.source == "computed" and view.counts() == {"watch": 1}
    assert view.verdicts.rows == [["H1", "watch", ["drift grew"]]]

    def broken(path):
        raise RuntimeError("no evidence table")

    monkeypatch.setattr(ensemble.assess, "assess_archive", broken, raising=False)
    with open_archive(archive) as a:
        view = assessment_view(a, archive)
    assert view.source == "none" and "RuntimeError: no evidence table" in view.notice


def test_the_assessment_group_is_shown(lab, tmp_path):
    from ensemble.archive import ArchiveWriter, TableField

    folder, archive = lab
    copy = tmp_path / "assessed.h5"
    shutil.copyfile(archive, copy)
    fields = (TableField("clock", "str", "none", "clock", 32),
              TableField("verdict", "str", "none", "keep, watch or retire", 16),
              TableField("reasons", "str", "none", "why, as a JSON list", 400),
              TableField("holdover_d", "f8", "d", "days until 100 ns"))
    rows = [{"clock": "H1", "verdict": "keep", "reasons": '["stable"]', "holdover_d": 40.0},
            {"clock": "R1", "verdict": "retire",
             "reasons": '["noise grew by 3x", "frequency steps"]', "holdover_d": 0.5}]
    with ArchiveWriter.open_for_append(copy) as w:
        w.write_table("/assessment/clocks", rows, fields, "per-clock verdicts")
        w.add_run_record("assess")
    text = write_report(copy, tmp_path / "rep").read_text(encoding="utf-8")
    section = text[text.index('id="assessment"'):text.index('id="runs"')]
    assert "not assessed yet" not in section
    assert "\u2717 retire" in section and "\u2713 keep" in section
    assert "<li>noise grew by 3x</li><li>frequency steps</li>" in section
    assert "holdover_d [d]" in section


# ------------------------------------------------------------------------------ atomic writing
def _fail(*args, **kwargs):
    raise RuntimeError("plot failed on purpose")


def test_a_failing_plot_leaves_the_previous_report_intact(lab, report, monkeypatch, tmp_path):
    folder, archive = lab
    target = tmp_path / "rep"
    shutil.copytree(report[0], target)
    before = tree_bytes(target)
    monkeypatch.setattr(figures_time, "plot_weights", _fail)
    with pytest.raises(RuntimeError, match="on purpose"):
        write_report(archive, target)
    assert tree_bytes(target) == before
    assert leftovers(tmp_path, "rep") == []


def test_a_failing_plot_leaves_no_partial_report(lab, monkeypatch, tmp_path):
    folder, archive = lab
    monkeypatch.setattr(figures_time, "plot_steering", _fail)
    assert cli.main(["report", str(archive), "-o", str(tmp_path / "rep")]) == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == []


def test_a_new_report_replaces_the_previous_one_and_stale_folders(lab, report, tmp_path):
    folder, archive = lab
    target = tmp_path / "rep"
    shutil.copytree(report[0], target)
    (target / "offsets_02.png").write_bytes(PNG_SIGNATURE)      # a page the new one lacks
    child = subprocess.Popen(["true"])
    child.wait()                                     # a pid that has ended
    stale = tmp_path / f".rep.tmp-{child.pid}-0123abcd"
    stale.mkdir()
    (stale / "index.html").write_text("half", encoding="utf-8")
    mine = tmp_path / f".rep.tmp-{os.getpid()}-89abcdef"   # a live process: left alone
    mine.mkdir()
    write_report(archive, target, days=2)
    names = sorted(p.name for p in target.iterdir())
    assert "offsets_02.png" not in names and "index.html" in names
    assert "the last 2 days" in (target / "index.html").read_text(encoding="utf-8")
    assert not stale.exists() and mine.exists()
    mine.rmdir()
    assert leftovers(tmp_path, "rep") == []


# ------------------------------------------------------------------------------ bad input
def run_cli(capsys, *argv):
    code = cli.main(["report", *map(str, argv)])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.mark.parametrize("case", ["not-hdf5", "missing", "dir-is-file", "no-parent",
                                  "foreign-folder", "days-zero", "days-nan", "parent-is-file"])
def test_bad_input_exits_2_with_one_line(lab, capsys, tmp_path, case):
    folder, archive = lab
    out_dir = tmp_path / "rep"
    args = [archive, "-o", out_dir]
    expected = None
    if case == "not-hdf5":
        bogus = tmp_path / "notes.h5"
        bogus.write_text("mjd,clock\n", encoding="utf-8")
        args[0], expected = bogus, "not an HDF5 file"
    elif case == "missing":
        args[0], expected = tmp_path / "nothing.h5", "archive not found"
    elif case == "dir-is-file":
        out_dir.write_text("x", encoding="utf-8")
        expected = "is a file, not a folder"
    elif case == "no-parent":
        args[2], expected = tmp_path / "a" / "b", "does not exist"
    elif case == "foreign-folder":
        out_dir.mkdir()
        (out_dir / "thesis.txt").write_text("mine", encoding="utf-8")
        expected = "not a report"
    elif case == "days-zero":
        args += ["--days", "0"]
        expected = "expected a number of days > 0"
    elif case == "days-nan":
        args += ["--days", "nan"]
        expected = "expected a number of days > 0"
    elif case == "parent-is-file":
        (tmp_path / "plain").write_text("x", encoding="utf-8")
        args[2], expected = tmp_path / "plain" / "rep", "is not a folder"
    before = sorted(p.name for p in tmp_path.iterdir())
    code, out, err = run_cli(capsys, *args)
    assert code == 2
    assert out == ""
    assert len(err.strip().splitlines()) == 1 and err.startswith("error: ")
    assert expected in err
    assert sorted(p.name for p in tmp_path.iterdir()) == before   # nothing written
    if case == "foreign-folder":
        assert (out_dir / "thesis.txt").read_text(encoding="utf-8") == "mine"


def test_an_unwritable_parent_exits_2(lab, capsys, tmp_path):
    folder, archive = lab
    parent = tmp_path / "locked"
    parent.mkdir()
    parent.chmod(0o500)
    try:
        if os.access(parent, os.W_OK):
            pytest.skip("running with privileges that ignore folder permissions (root)")
        code, out, err = run_cli(capsys, archive, "-o", parent / "rep")
    finally:
        parent.chmod(0o700)
    assert code == 2 and "permission denied" in err and len(err.splitlines()) == 1


def test_a_folder_that_cannot_be_created_exits_2(lab, capsys, tmp_path, monkeypatch):
    folder, archive = lab
    real_mkdir = pathlib.Path.mkdir

    def refuse(self, *args, **kwargs):
        if self.name.startswith(".rep.tmp-"):
            raise PermissionError(13, "Permission denied")
        return real_mkdir(self, *args, **kwargs)

    monkeypatch.setattr(pathlib.Path, "mkdir", refuse)
    code, out, err = run_cli(capsys, archive, "-o", tmp_path / "rep")
    assert code == 2 and "cannot create a folder" in err and len(err.splitlines()) == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == []


# ------------------------------------------------------------------------------ rendering
CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                  "--no-first-run", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync")
PROBE = """<script>
window.addEventListener("load", function () {
  var out = [];
  for (var i = 0; i < document.images.length; i++) {
    var im = document.images[i];
    out.push(im.getAttribute("src") + "=" + im.naturalWidth + "x" + im.naturalHeight);
  }
  var p = document.createElement("pre");
  p.id = "probe";
  p.textContent = "IMAGES " + out.join(" ");
  document.body.appendChild(p);
});
</script>"""


def _chromium() -> str:
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    pytest.skip("chromium is not installed (Debian: apt-get install -y chromium); the "
                "headless rendering check did not run")


def _browse(browser: str, *args: str) -> subprocess.CompletedProcess:
    with tempfile.TemporaryDirectory() as profile:
        return subprocess.run([browser, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", *args],
                              capture_output=True, text=True, timeout=120)


def test_the_page_renders_in_headless_chromium(report, tmp_path):
    browser = _chromium()
    folder, text = report
    # The probe runs on a copy: the report itself holds no script.
    probe_dir = tmp_path / "probe"
    shutil.copytree(folder, probe_dir)
    (probe_dir / "index.html").write_text(text.replace("</body>", PROBE + "</body>"),
                                          encoding="utf-8")
    done = _browse(browser, "--virtual-time-budget=10000", "--dump-dom",
                   (probe_dir / "index.html").as_uri())
    assert done.returncode == 0, done.stderr[-2000:]
    match = re.search(r"IMAGES ([^<]*)</pre>", done.stdout)
    assert match, done.stdout[-2000:]
    loaded = dict(item.split("=") for item in match.group(1).split())
    expected = {a["src"] for tag, a in parse(text).tags if tag == "img"}
    assert set(loaded) == expected
    for src, size in loaded.items():
        width, height = map(int, size.split("x"))
        assert (width, height) == png_size(folder / src), src
    shot = tmp_path / "shot.png"
    done = _browse(browser, "--hide-scrollbars", "--window-size=1280,2400",
                   f"--screenshot={shot}", (folder / "index.html").as_uri())
    assert done.returncode == 0 and shot.is_file(), done.stderr[-2000:]
    from matplotlib.image import imread
    pixels = imread(shot)
    assert pixels.shape[:2] == (2400, 1280)
    # The page is mostly white with dark text and coloured figures, not blank.
    assert 0.05 < float(np.mean(pixels[..., :3] < 0.5)) < 0.6
