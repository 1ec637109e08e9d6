"""docs/steering.md shows real output: rerun its example and compare the printed lines."""

import re

from ensemble import cli

from conftest import ROOT


def test_docs_example_output_is_current(capsys, monkeypatch):
    # Regression: the example block of docs/steering.md is the output of this very command
    # (seeded simulation); the two "wrote ..." lines are left out (no files are written here).
    doc = (ROOT / "docs" / "steering.md").read_text()
    block = re.search(r"```\n\$ (ensemble steer --simulate [^\n]+)\n(.*?)```", doc, re.S)
    assert block is not None
    expected = [line for line in block.group(2).splitlines() if "wrote " not in line]
    argv = block.group(1).split()[1:]
    for option in ("--plot", "-o"):
        i = argv.index(option)
        del argv[i:i + 2]
    monkeypatch.chdir(ROOT)
    assert cli.main(argv) == 0
    printed = capsys.readouterr().out.splitlines()
    assert printed == expected
