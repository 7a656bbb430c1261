"""The file-format references in docs/ are checked against the code, so they cannot drift."""
from __future__ import annotations

import re
from pathlib import Path

import pytest

from dnmr import modelfile

DOCS = Path(__file__).resolve().parent.parent / "docs"


def documented_keys(*pages: str) -> set[str]:
    text = "\n".join((DOCS / p).read_text() for p in pages if (DOCS / p).exists())
    return set(re.findall(r"`\[*([a-z_]+)\]*`", text))


@pytest.mark.parametrize("section, keys", [
    ("top level", modelfile.TOP_KEYS),
    ("spectrometer", modelfile.SPECTROMETER_KEYS),
    ("window", modelfile.WINDOW_KEYS),
    ("conditions", modelfile.CONDITIONS_KEYS),
    ("state", modelfile.STATE_KEYS),
    ("exchange", modelfile.EXCHANGE_KEYS),
])
def test_every_model_key_is_documented(section, keys):
    missing = set(keys) - documented_keys("model-file.md", "spin-systems.md")
    assert not missing, f"{section} keys missing from docs/model-file.md: {sorted(missing)}"


def test_documented_example_model_loads(tmp_path):
    text = (DOCS / "model-file.md").read_text()
    example = text.split("```toml", 1)[1].split("```", 1)[0]
    path = tmp_path / "example.toml"
    path.write_text(example)
    model = modelfile.load_model(path)
    assert model.state_names == ["syn", "anti"]
