"""The file-format references in docs/ are checked against the code, so they cannot drift."""
from __future__ import annotations

import re
from pathlib import Path

import pytest

from dnmr.fitting import seriesfile, seriesoutput
from dnmr.io import modelfile
from dnmr.cli import cli as dnmr_cli

DOCS = Path(__file__).resolve().parent.parent / "docs"


def documented_keys(*pages: str) -> set[str]:
    text = "\n".join((DOCS / p).read_text() for p in pages if (DOCS / p).exists())
    return set(re.findall(r"`\[*([a-z0-9_]+)\]*`", text))


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


# --------------------------------------------------------------------------------------------------
# docs/cli.md and docs/series-file.md against the code (the issue's "generated or checked against the
# code": a command or option added without its description fails here)


def cli_sections() -> dict[str, str]:
    """The text of docs/cli.md under each "## `dnmr <command>`" heading, by command name."""
    text = (DOCS / "cli.md").read_text()
    parts = re.split(r"^## `dnmr ?([a-z-]*)`\s*$", text, flags=re.M)
    return {name: body for name, body in zip(parts[1::2], parts[2::2])}


def test_cli_reference_has_every_command():
    from dnmr.cli import cli

    sections = cli_sections()
    assert set(cli.commands) | {""} == set(sections), "docs/cli.md sections differ from the commands dnmr has"


@pytest.mark.parametrize("name", sorted(dnmr_cli.commands) + [""])
def test_cli_reference_has_every_option(name):
    from dnmr.cli import cli

    command = cli.commands[name] if name else cli
    body = cli_sections()[name]
    documented = set(re.findall(r"^\| `([^`]+)`(?:, `([^`]+)`)? \|", body, flags=re.M))
    names = {n for pair in documented for n in pair if n}
    for param in command.params:
        if param.param_type_name == "argument":
            assert param.name.upper() in names, f"dnmr {name}: argument {param.name.upper()} not in docs/cli.md"
        else:
            for opt in param.opts:
                assert opt in names, f"dnmr {name}: option {opt} not in its table in docs/cli.md"
    assert "```\ndnmr " in body, f"dnmr {name}: no example in docs/cli.md"


def test_cli_examples_name_real_commands_and_options():
    # every example line must be accepted by click's parser (parsing only: the files need not exist)
    from dnmr.cli import cli

    for name, body in cli_sections().items():
        for block in re.findall(r"```\n(.*?)```", body, flags=re.S):
            for line in block.strip().splitlines():
                words = line.split()[1:]
                while words and words[0].startswith("--") and words[0] in {o for p in cli.params for o in p.opts}:
                    words = words[1:]
                command = cli.commands[words[0]]
                context = command.make_context(words[0], words[1:])
                assert context.params is not None, line


@pytest.mark.parametrize("section, keys", [
    ("top level", seriesfile.SERIES_KEYS),
    ("fit", seriesfile.SERIES_FIT_KEYS),
    ("spectrum", seriesfile.SPECTRUM_KEYS),
    ("rates.csv", set(seriesoutput.RATE_COLUMNS) | set(seriesoutput.TAIL_COLUMNS)),
])
def test_every_series_key_and_output_column_is_documented(section, keys):
    documented = set(re.findall(r"`\[*([a-z0-9_]+)\]*`", (DOCS / "series-file.md").read_text()))
    missing = set(keys) - documented
    assert not missing, f"{section} keys missing from docs/series-file.md: {sorted(missing)}"


def test_series_reference_lists_the_contract_columns():
    # CONTRACT.md section 3: rates.csv has at least temperature_k, process, rate_per_s, rate_stderr,
    # and rate_lower / rate_upper for a rate the data only bound
    text = (DOCS / "series-file.md").read_text()
    table = text.split("## Output: `rates.csv`", 1)[1].split("## ", 1)[0]
    for column in ("temperature_k", "process", "rate_per_s", "rate_stderr", "rate_lower", "rate_upper"):
        assert f"| `{column}` |" in table, column


@pytest.mark.parametrize("section, module, keys", [
    ("experiment file", "transferfile", "EXPERIMENT_KEYS"),
    ("options", "transferfile", "OPTION_KEYS"),
    ("rates.csv", "transfer", "TRANSFER_COLUMNS"),
])
def test_every_transfer_key_and_column_is_documented(section, module, keys):
    import importlib

    documented = set(re.findall(r"`\[*([a-z0-9_]+)\]*`", (DOCS / "transfer-file.md").read_text()))
    missing = set(getattr(importlib.import_module(f"dnmr.fitting.{module}"), keys)) - documented
    assert not missing, f"{section} keys missing from docs/transfer-file.md: {sorted(missing)}"


def test_parameter_settings_have_one_set_of_names_in_docs_and_code():
    # the settings keys of the code are the ones the reference documents, and no page, example or
    # demo file still writes a setting in the spellings of earlier releases (value, vary, min, max, expr)
    from dnmr.fitting import parameters

    text = (DOCS / "series-file.md").read_text()
    table = text.split("#### Parameter settings", 1)[1].split("\n\n", 2)[1]
    first_cells = [line.split("|")[1] for line in table.splitlines() if line.startswith("| `")]
    assert {k for cell in first_cells for k in re.findall(r"`([a-z_]+)`", cell)} == set(parameters.SETTING_KEYS)
    root = DOCS.parent
    files = [*DOCS.glob("*.md"), root / "README.md", *root.glob("examples/**/*.toml"), *root.glob("examples/**/*.py"),
             *root.glob("dnmr/data/**/*.toml"), *root.glob("dnmr/*.py")]
    old = re.compile(r"\{[^}\n]*\b(value|vary|min|max|expr)\s*=[^}\n]*\}")
    stale = [f"{p.name}: {m.group(0)}" for p in files if p.exists() for m in old.finditer(p.read_text())]
    assert not stale, stale
    # and results.json names every key of a fitted parameter's record, a tie's and a rule's too
    import lmfit

    params = lmfit.Parameters()
    params.add("population_b", 0.4)
    params.add("population_a", expr="1 - population_b")
    params.add("linewidth_hz_a", 1.0)
    params.add("linewidth_hz_b", expr="2.0 * linewidth_hz_a + 0.5")
    keys = {k for p in params.values() for k in parameters.parameter_record(p)}
    documented = set(re.findall(r"`([a-z_]+)`", (DOCS / "cli.md").read_text()))
    assert {"same_as", "times", "plus", "rule"} <= keys and keys <= documented, keys - documented
