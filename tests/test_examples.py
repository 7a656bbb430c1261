"""The worked examples in examples/ run as their READMEs say, write what they promise, and touch nothing else.

Each example README has one ``sh`` block of commands, run from the top of the repository: the example's
script (run here in a subprocess, as a user would) and ``dnmr`` commands (run in-process through click's
test runner).  They run in a temporary folder with ``examples/`` paths pointed at the real examples.
"""
from __future__ import annotations

import os
import re
import shlex
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

import dnmr
from dnmr.cli import cli

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"

#: What each script writes into its output folder.
EXPECTED = {
    "two_site_unequal": ["vt_stack.png", "coalescence.txt", "spectrum_at_coalescence.csv"],
    "three_site_cyclic": ["rate_stack.png", "fast_limit.png", "summary.txt"],
    "ab_mutual": ["vt_stack.png", "regimes.png", "fast_limit.png", "summary.txt"],
    "conformers_couplings": ["vt_stack.png", "data/model.toml", "data/series.toml", "data/truth.csv",
                             *(f"data/spectra/cx5_{t}K.txt" for t in (200, 215, 230, 250)),
                             "fit_230K.txt", "fit_230K.png"],
    "planning": ["planned_stacks.png", "regimes.png", "plan_cdcl3.txt", "plan_toluene-d8.txt", "timescale.txt"],
    "temperature_calibration": ["calibration.csv", "rates.csv", "methanol_250K.txt", "eyring_calibrated.txt",
                                "eyring_calibrated.png", "comparison.txt"],
    "heteronuclear_groups": ["vt_stack.png", "summary.txt"],
    "transfer_and_lineshape": ["data/model.toml", "data/series.toml", "data/truth.csv", "data/inversion_252K.toml",
                               "data/inversion_252K.csv", "si-252K/rates.csv", "si-252K/results.json",
                               "lineshape-fit/rates.csv", "eyring.png", "summary.txt"],
}

#: Lines each script prints that carry its point (a check that the README's claims still hold).
CLAIMS = {
    "two_site_unequal": [r"relative difference engine \(narrow lines\) vs closed form: -?\d\.\de-0[6-9]"],
    "ab_mutual": [r"Kurland-Rubin-Wise: .*\(relative difference -?\d\.\de-0[6-9]\)",
                  r"coupling Ha-Hb \(-13\.40 Hz\) does not show: equivalent nuclei"],
    "three_site_cyclic": [r"H1, H2, H3 at -9\.2167 ppm: magnetically equivalent"],
    "conformers_couplings": [r"chair flip  k = [\d.]+ ± [\d.]+ s\^-1"],
    "planning": [r"above the boiling point of chloroform-d", r"Cautions:"],
    "temperature_calibration": [r"methanol is toxic", r"calibrated temperatures +5[12]\.\d\d ±"],
    "transfer_and_lineshape": [r"inversion and lineshapes \(\d rates\): ΔH‡ = 6\d\.\d\d ± 0\.\d\d kJ/mol",
                               r"the error of ΔS‡ shrinks \d\.\d-fold"],
    # binomial 1:3:3:1 (common practice); groups against the nuclei written out; the H-F coupling kept
    "heteronuclear_groups": [r"largest difference from 1 : 3 : 3 : 1: \d\.\de-(1[0-9]|0[89])|: 0\.0e\+00",
                             r"nucleus by nucleus .* largest difference \d\.\de-1[2-9]",
                             r"spacing 9\.20 Hz: the H-F coupling of 9\.2 Hz stays"],
}


def script_of(example: str) -> Path:
    return EXAMPLES / example / f"{example}.py"


def readme_commands(example: str) -> list[list[str]]:
    """The commands of the example README's ``sh`` block, split into words."""
    text = (EXAMPLES / example / "README.md").read_text()
    blocks = re.findall(r"```sh\n(.*?)```", text, flags=re.S)
    assert len(blocks) == 1, f"examples/{example}/README.md should have exactly one ```sh block of commands"
    return [shlex.split(line) for line in blocks[0].splitlines() if line.strip()]


def run_script(script: Path, *args: str, cwd: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "MPLBACKEND": "Agg"}
    return subprocess.run([sys.executable, str(script), *args], cwd=cwd, env=env, capture_output=True, text=True,
                          timeout=120)


def tree(folder: Path) -> dict[str, int]:
    return {str(p.relative_to(folder)): p.stat().st_mtime_ns for p in folder.rglob("*")}


@pytest.mark.parametrize("example", sorted(EXPECTED))
def test_example_runs_as_its_readme_says(example, tmp_path, monkeypatch):
    before = tree(EXAMPLES)
    commands = readme_commands(example)
    assert commands[0][:2] == ["python", f"examples/{example}/{example}.py"] and len(commands[0]) == 3, \
        "the first command runs the example's script with an output folder"
    monkeypatch.chdir(tmp_path)
    for words in commands:
        words = [str(EXAMPLES / w.removeprefix("examples/")) if w.startswith("examples/") else w for w in words]
        if words[0] == "python":
            done = run_script(Path(words[1]), *words[2:], cwd=tmp_path)
            assert done.returncode == 0, done.stderr[-3000:]
            out = tmp_path / words[2]
            for name in EXPECTED[example]:
                assert (out / name).is_file() and (out / name).stat().st_size > 0, f"{example} did not write {name}"
            for claim in CLAIMS.get(example, []):
                assert re.search(claim, done.stdout), f"{example}: no line matching {claim!r} in its output"
        else:
            assert words[0] == "dnmr", f"unexpected command {words[0]!r} in the README of {example}"
            run = CliRunner().invoke(cli, words[1:])
            assert run.exit_code == 0, f"{shlex.join(words)}\n{run.output[-3000:]}"
            for option in ("-o", "--output", "--plot"):
                if option in words:
                    assert (tmp_path / words[words.index(option) + 1]).exists(), f"{shlex.join(words)} wrote nothing"
    assert tree(EXAMPLES) == before, "running the example changed files in examples/"


def test_script_refuses_a_folder_that_holds_files(tmp_path):
    out = tmp_path / "earlier"
    out.mkdir()
    (out / "result.txt").write_text("an earlier result\n")
    done = run_script(script_of("two_site_unequal"), str(out), cwd=tmp_path)
    assert done.returncode == 2
    assert "already exists and is not empty" in done.stderr and "Traceback" not in done.stderr
    assert [p.name for p in out.iterdir()] == ["result.txt"]
    assert (out / "result.txt").read_text() == "an earlier result\n"


def test_script_refuses_to_write_into_examples(tmp_path):
    target = EXAMPLES / "two_site_unequal" / "output-here"
    done = run_script(script_of("two_site_unequal"), str(target), cwd=tmp_path)
    assert done.returncode == 2 and "among the inputs" in done.stderr
    assert not target.exists()


def test_every_example_has_a_readme_a_script_and_an_index_entry():
    folders = sorted(p.name for p in EXAMPLES.iterdir() if p.is_dir() and not p.name.startswith(("_", ".")))
    assert folders == sorted(EXPECTED), "every example folder needs an entry in EXPECTED (and the other way round)"
    index = (EXAMPLES / "README.md").read_text()
    for name in folders:
        assert (EXAMPLES / name / "README.md").is_file() and script_of(name).is_file()
        assert f"]({name}/)" in index, f"examples/README.md does not link {name}/"
        assert "invented" in (EXAMPLES / name / "README.md").read_text()


@pytest.mark.parametrize("path", sorted(EXAMPLES.rglob("*.toml")), ids=lambda p: str(p.relative_to(EXAMPLES)))
def test_every_example_model_file_loads(path):
    model = dnmr.load_model(path)
    assert "invented" in model.title
    assert model.exchanges, "an example model without an exchange process shows nothing dynamic"
    spectrum = dnmr.simulate(model, points=256)
    assert spectrum.integral() > 0
