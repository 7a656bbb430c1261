"""A shared check for bad model files: one InputError line naming the file and the key."""
from __future__ import annotations

import pytest

import dnmr


def assert_one_line_error(tmp_path, text: str, key: str) -> None:
    """Loading `text` as a model file fails with one line that names the file and `key`."""
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(dnmr.InputError) as info:
        dnmr.load_model(path)
    message = str(info.value)
    assert "bad.toml" in message and key in message and "\n" not in message, message
