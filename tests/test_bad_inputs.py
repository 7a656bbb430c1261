"""The bad-input corpus: every malformed file ends with exit status 2 and one line naming the file, its
place and the fix — no traceback, nothing written next to the input, earlier results untouched
(CONTRACT.md section 5; the project's rules on bad input)."""
from __future__ import annotations

import hashlib
from pathlib import Path

import pytest
from click.testing import CliRunner

from dnmr.cli import cli

CORPUS = Path(__file__).resolve().parent / "bad_inputs"


def digest(folder: Path) -> dict[str, str]:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.iterdir()) if p.is_file()}


def command_for(path: Path, out: Path) -> list[str]:
    kind = path.parent.name
    if kind == "model":
        return ["simulate", str(path), "-o", str(out / "spectrum.csv")]
    raise AssertionError(f"no command for corpus folder {kind}")


CASES = sorted(p for p in CORPUS.glob("*/*") if p.is_file() and p.suffix != ".md")


def test_corpus_is_large_enough():
    assert len(CASES) >= 30


@pytest.mark.parametrize("path", CASES, ids=lambda p: f"{p.parent.name}/{p.name}")
def test_bad_input_is_one_clear_line(path, tmp_path):
    before = digest(path.parent)
    out = tmp_path / "out"
    out.mkdir()
    (out / "earlier.txt").write_text("an earlier result")
    result = CliRunner().invoke(cli, command_for(path, out))
    message = result.output.strip()
    assert result.exit_code == 2, message
    assert "Traceback" not in message and len(message.splitlines()) == 1, message
    assert path.name in message, message
    assert digest(path.parent) == before  # the input folder is untouched
    assert [p.name for p in out.iterdir()] == ["earlier.txt"] and (out / "earlier.txt").read_text() == "an earlier result"
