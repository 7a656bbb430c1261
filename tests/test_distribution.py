"""The distribution's name is dnmr's own (``dnmr`` on the public package index is an unrelated project),
while the import package and the command stay ``dnmr``; the version has one home."""
from __future__ import annotations

import re
from pathlib import Path

import dnmr
from dnmr.io.modelfile import read_toml

ROOT = Path(__file__).resolve().parent.parent
PYPROJECT = read_toml(ROOT / "pyproject.toml")
PROJECT = PYPROJECT["project"]


def test_distribution_is_not_named_dnmr_and_the_readme_says_what_it_is():
    name = PROJECT["name"]
    assert name != "dnmr" and name.startswith("dnmr")
    readme = (ROOT / "README.md").read_text()
    assert f"The distribution is named `{name}`" in readme
    assert "python -m pip install . && dnmr demo dnmr-demo" in readme  # the set-up commands still hold


def test_command_and_import_package_stay_dnmr_with_one_version():
    assert PROJECT["scripts"] == {"dnmr": "dnmr.cli:main"}
    assert "version" in PROJECT["dynamic"] and "version" not in PROJECT
    assert PYPROJECT["tool"]["setuptools"]["dynamic"]["version"] == {"attr": "dnmr.__version__"}
    assert re.fullmatch(r"\d+\.\d+\.\d+", dnmr.__version__)


def test_no_install_hint_names_the_strangers_distribution():
    for path in [*(ROOT / "dnmr").rglob("*.py"), *(ROOT / "docs").glob("*.md"), ROOT / "README.md"]:
        text = path.read_text()
        assert not re.search(r"pip install [\"']?dnmr(\[|[\"']|\s|$)", text), path
