"""The README's main command: `dnmr demo` runs the whole job on the bundled data and writes every result.

(The demo spectra are invented and made with dnmr's own engine, so this is a check that the job runs end
to end, not a check of accuracy: accuracy is tested against independent references elsewhere.)
"""
from __future__ import annotations

import json

import matplotlib.pyplot as plt
from click.testing import CliRunner

from dnmr.cli import cli


def test_demo_writes_the_whole_job(tmp_path):
    out = tmp_path / "demo"
    before = set(plt.get_fignums())
    result = CliRunner().invoke(cli, ["demo", str(out)])
    assert result.exit_code == 0, result.output
    assert set(plt.get_fignums()) == before  # the figures it saved are closed
    for name in ("fit/rates.csv", "fit/results.json", "fit/series_fits.png", "eyring.txt", "eyring.json",
                 "eyring.png", "plan.txt", "timescale.txt", "timescale.png", "report.html"):
        assert (out / name).stat().st_size > 100, name
    assert "recovered against the invented truth" in result.output
    # stderr is not a terminal here: the series fit reports plain progress lines, one per spectrum
    assert "fits with held values: 13 of 13 done (" in result.stderr and "\x1b" not in result.stderr
    again = CliRunner().invoke(cli, ["demo", str(out)])
    assert again.exit_code == 2 and "already exists" in again.output  # earlier results are not overwritten
    assert "eyring.png" in json.loads((out / "demo.json").read_text())["files"]  # what --overwrite may replace


def test_demo_overwrite_never_replaces_files_it_did_not_write(tmp_path):
    # a folder of the user's own with a file named like a demo result: refused before any work, kept
    out = tmp_path / "mine"
    out.mkdir()
    (out / "eyring.png").write_bytes(b"the user's own figure")
    result = CliRunner().invoke(cli, ["demo", str(out), "--overwrite"])
    assert result.exit_code == 2 and "did not write" in result.output, result.output
    assert (out / "eyring.png").read_bytes() == b"the user's own figure"
    assert sorted(p.name for p in out.iterdir()) == ["eyring.png"]
