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


# --------------------------------------------------------------------------------------------------
# issue 16: one idea, one name. The docs and the code use the same names: every JSON key dnmr writes is
# in docs/output-keys.md and every key there is written; every option the docs name exists; the names of
# earlier releases are refused with a "renamed to" line and appear in the docs only in the table of
# renamed names.

ROOT = DOCS.parent
#: Maps keyed by names (of processes, parameters, methods, libraries...): their keys are data, not names
#: of dnmr's; their values are walked.
NAMED_MAPS = {"parameters", "correlations", "methods", "method_offsets", "quantities", "lines", "differences",
              "held_shares", "gains", "treatments", "versions", "setting"}
#: Values described as a whole in docs/output-keys.md (their inner keys are data, or documented elsewhere).
OPAQUE = {"error_shares", "processing", "calibration", "options", "two_step", "treatment", "shared_rate_errors",
          "rate_noise"}


def written_keys(data, opaque: set[str] = OPAQUE, found: set[str] | None = None,
                 named: set[str] = NAMED_MAPS) -> set[str]:
    """Every key of a JSON document that names something of dnmr's (see NAMED_MAPS and OPAQUE)."""
    found = set() if found is None else found
    if isinstance(data, dict):
        for key, value in data.items():
            found.add(key)
            if key in opaque:
                continue
            for inner in (value.values() if key in named and isinstance(value, dict) else [value]):
                written_keys(inner, opaque, found, named)
    elif isinstance(data, list):
        for value in data:
            written_keys(value, opaque, found, named)
    return found


def documented_output_keys(*sections: str) -> tuple[set[str], set[str]]:
    """The keys in the tables of these sections of docs/output-keys.md, and those written only sometimes
    (the row's meaning begins with "only")."""
    text = (DOCS / "output-keys.md").read_text()
    parts = dict(zip(*[iter(re.split(r"^#{2,3} (.+)$", text, flags=re.M)[1:])] * 2))
    every, always = set(), set()
    for section in sections:
        for row in re.findall(r"^\| (`.+?) \|.*?\| (.*) \|$", parts[section], flags=re.M):
            keys = set(re.findall(r"`([a-z0-9_]+)`", row[0]))
            every |= keys
            if not row[1].startswith("only"):
                always |= keys
    return every, every - always


EYRING = ("`dnmr eyring --json`", "Posterior (`--posterior`)")
RESULTS = ("`results.json` (`dnmr fit`)", "Posterior (`--posterior`)")
GLOBAL = ("`global.json` (`dnmr fit --global`)",)


@pytest.fixture(scope="module")
def written(tmp_path_factory) -> dict[str, dict]:
    """results.json, global.json and `dnmr eyring --json` of a small invented series: a two-site
    exchange at four temperatures, spectra from the McConnell closed form (J. Chem. Phys. 28, 430 (1958);
    tests/closed_forms.py), rates from the Eyring equation with invented activation parameters."""
    import json

    import numpy as np
    from click.testing import CliRunner

    from closed_forms import mcconnell_two_site
    from reference_eyring import eyring_rate
    from dnmr.fitting.globalfit import fit_series_global

    folder = tmp_path_factory.mktemp("names")
    (folder / "model.toml").write_text(
        '[spectrometer]\nnucleus = "1H"\nfrequency_mhz = 400.0\n'
        '[[state]]\nname = "a"\npopulation = 0.5\nlinewidth_hz = 1.5\nshifts_ppm = { H = 2.92 }\n'
        '[[state]]\nname = "b"\npopulation = 0.5\nlinewidth_hz = 1.5\nshifts_ppm = { H = 3.08 }\n'
        '[[exchange]]\nname = "flip"\nfrom = "a"\nto = "b"\nrate_per_s = 100.0\n')
    ppm, rng = np.linspace(2.7, 3.3, 300), np.random.default_rng(16)
    lines = ['model = "model.toml"', "[fit]", "region_ppm = [2.7, 3.3]", 'linewidth = "shared"']
    for t in (262.0, 282.0, 302.0, 322.0):
        y = 40.0 * mcconnell_two_site(ppm * 400.0, 2.92 * 400.0, 3.08 * 400.0, eyring_rate(t, 55.0, -12.0), 0.5,
                                      1.5, 1.5).real + rng.normal(0.0, 0.03, ppm.size)
        (folder / f"t{t:.0f}.txt").write_text("ppm\tintensity\n" + "\n".join(f"{p:.6f}\t{v:.7f}" for p, v in zip(ppm, y)))
        lines += ["[[spectrum]]", f'file = "t{t:.0f}.txt"', f"temperature_k = {t}"]
    (folder / "series.toml").write_text("\n".join(lines) + "\n")
    out = folder / "out"
    fit_series_global(folder / "series.toml", out, workers=1, progress=False)
    eyring = CliRunner().invoke(dnmr_cli, ["eyring", str(out / "two-step" / "rates.csv"), "--json"])
    assert eyring.exit_code == 0, eyring.output
    return {"results": json.loads((out / "two-step" / "results.json").read_text()),
            "global": json.loads((out / "global.json").read_text()), "eyring": json.loads(eyring.stdout)}


@pytest.mark.parametrize("name, sections", [("eyring", EYRING), ("results", RESULTS), ("global", GLOBAL)])
def test_every_json_key_written_is_documented_and_every_documented_key_written(written, name, sections):
    keys = written_keys(written[name], OPAQUE - {"options"} if name == "global" else OPAQUE)  # the global fit's own
    documented, sometimes = documented_output_keys(*sections)
    assert not keys - documented, f"{name}: keys written but not in docs/output-keys.md: {sorted(keys - documented)}"
    missing = documented - sometimes - keys
    assert not missing, f"{name}: keys in docs/output-keys.md that are not written: {sorted(missing)}"


def test_keys_written_inside_the_opaque_values_are_documented_where_the_table_says(written):
    # global.json's two_step holds `dnmr eyring --json` objects; the fit options are the series file's [fit] keys
    eyring, _ = documented_output_keys(*EYRING)
    for entry in written["global"]["two_step"]:
        assert written_keys(entry) <= eyring
    for options in [written["results"]["options"]] + [s["fit"]["options"] for s in written["results"]["spectra"]]:
        assert set(options) <= set(seriesfile.SERIES_FIT_KEYS)


def test_every_option_the_docs_name_exists():
    # the tables of docs/cli.md name only options the command has, and no page, README or example
    # mentions an option no command has (a renamed one appears only in the table of renamed names)
    options = {o for p in dnmr_cli.params for o in p.opts}
    for name, command in dnmr_cli.commands.items():
        own = {o for p in command.params for o in p.opts} | {"--help"}
        options |= own
        body = cli_sections()[name]
        for pair in re.findall(r"^\| `(-[^`]+)`(?:, `([^`]+)`)? \|", body, flags=re.M):
            assert {n for n in pair if n} <= own, f"dnmr {name}: docs/cli.md documents {pair}, which it lacks"
    renamed_table = (DOCS / "troubleshooting.md").read_text().split("(renamed names)", 1)[1].split("\n## ", 1)[0]
    pages = [*DOCS.glob("*.md"), ROOT / "README.md", *ROOT.glob("examples/**/*.md"), *ROOT.glob("examples/**/*.py")]
    for page in pages:
        text = page.read_text().replace(renamed_table, "")
        for option in set(re.findall(r"(?<![\w-])--[a-z][a-z0-9-]*", text)):
            assert option in options, f"{page.name}: {option} is no option of dnmr"


@pytest.mark.parametrize("command, old, new", [(c, o, n) for c, m in __import__("dnmr.cli", fromlist=["x"]).RENAMED_OPTIONS.items()
                                               for o, n in m.items()])
def test_an_option_of_an_earlier_release_is_refused_with_its_new_name(command, old, new):
    from click.testing import CliRunner

    assert new in {o for p in dnmr_cli.commands[command].params for o in p.opts}
    for given in ([old, "1"], [f"{old}=1"]):
        run = CliRunner().invoke(dnmr_cli, [command, "x.toml", *given])
        assert run.exit_code == 2 and run.stderr.strip() == f"dnmr: error: the option {old} was renamed to {new}"


def test_names_of_earlier_releases_appear_only_in_the_table_of_renamed_names():
    # every renamed input (options, fit parameter names, rates.csv columns, parameter settings) and output
    # is in the table of docs/troubleshooting.md, and no other page, README, example or bundled file
    # still writes it
    from dnmr.activation.rate_table import RENAMED_RATE_COLUMNS
    from dnmr.cli import RENAMED_OPTIONS
    from dnmr.fitting.parameters import RENAMED_PREFIXES

    text = (DOCS / "troubleshooting.md").read_text()
    table = text.split("(renamed names)", 1)[1].split("\n## ", 1)[0]
    old_cells = {k for line in table.splitlines() if line.startswith("| `")
                 for k in re.findall(r"`([^`]+)`", line.split("|")[1])}
    inputs = ({o for m in RENAMED_OPTIONS.values() for o in m} | set(RENAMED_RATE_COLUMNS)
              | {p + "<process>" for p in RENAMED_PREFIXES})
    assert inputs <= old_cells, inputs - old_cells
    stale = [rf"(?<!\w){re.escape(n)}(?!\w)" for n in old_cells if re.fullmatch(r"[a-z0-9_]+", n) and "_" in n]
    stale += [rf"(?<!\w){re.escape(p)}\w" for p in RENAMED_PREFIXES]
    files = [*DOCS.glob("*.md"), ROOT / "README.md", *ROOT.glob("examples/**/*.py"), *ROOT.glob("examples/**/*.md"),
             *ROOT.glob("examples/**/*.toml"), *ROOT.glob("dnmr/data/**/*.toml")]
    for path in files:
        body = path.read_text().replace(table, "")
        found = [m.group(0) for pattern in stale for m in [re.search(pattern, body)] if m]
        assert not found, f"{path.name} still names {found}"


PLAN = ("`dnmr plan --json`", "Activation parameters assumed (`activation`)", "Exchanging pairs (`coalescence`, `measurable_range`, `pairs`)",
        "Magnetisation transfer (`magnetisation_transfer`)")
TIMESCALE = ("`dnmr timescale --json`", "Activation parameters assumed (`activation`)", "Exchanging pairs (`coalescence`, `measurable_range`, `pairs`)",
             "Magnetisation transfer (`magnetisation_transfer`)")
#: Maps of the planning output keyed by a process, a pair or a spin.
PLANNING_MAPS = {"activation", "rates_per_s", "regimes", "ln_rate_stderr", "shifts_ppm", "couplings_hz"}


@pytest.mark.parametrize("command, sections", [
    (["plan", "--solvent", "toluene-d8"], PLAN), (["timescale", "--temperature-k", "250"], TIMESCALE)])
def test_every_planning_key_written_is_documented_and_every_documented_key_written(command, sections):
    import json

    from click.testing import CliRunner

    model = ROOT / "examples" / "ab_mutual" / "model.toml"  # a ring inversion of an AB pair: a coupling hides
    result = CliRunner().invoke(dnmr_cli, [command[0], str(model), "--json", *command[1:]])
    assert result.exit_code == 0, result.output
    keys = written_keys(json.loads(result.stdout), OPAQUE, named=NAMED_MAPS | PLANNING_MAPS)
    documented, sometimes = documented_output_keys(*sections)
    assert not keys - documented, f"{command[0]}: keys written but not in docs/output-keys.md: {sorted(keys - documented)}"
    missing = documented - sometimes - keys
    assert not missing, f"{command[0]}: keys in docs/output-keys.md that are not written: {sorted(missing)}"
