"""Reading model files (TOML, layout fixed in the project's interface contract) into :class:`Model`.

Every problem becomes one :class:`~dnmr.errors.InputError` naming the file and the key
(``exchange[1].spins``), with a "did you mean" for misspelt keys.
"""
from __future__ import annotations

import math
import re
import sys
from pathlib import Path
from typing import Any

from dnmr.errors import InputError, did_you_mean
from dnmr.io.inputfiles import read_input_bytes
from dnmr.model import Model
from dnmr.modelparts import Exchange, Spectrometer, State

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

MAX_FILE_BYTES = 8 * 2**20

TOP_KEYS = {"title", "spectrometer", "window", "conditions", "state", "exchange", "groups", "heteronuclei"}
SPECTROMETER_KEYS = {"nucleus", "frequency_mhz"}
WINDOW_KEYS = {"ppm", "points"}
CONDITIONS_KEYS = {"temperature_k"}
STATE_KEYS = {"name", "population", "free_energy_kj_mol", "linewidth_hz", "shifts_ppm", "couplings_hz", "r1_per_s"}
EXCHANGE_KEYS = {"name", "from", "to", "spins", "rate_per_s", "barrier_kj_mol", "enthalpy_kj_mol", "entropy_j_mol_k"}


def read_toml(path: str | Path) -> dict[str, Any]:
    """Parse a TOML file; syntax errors and unreadable files become one-line InputErrors."""
    path = Path(path)
    raw = read_input_bytes(path, MAX_FILE_BYTES, "TOML file")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise InputError("is not UTF-8 text; save it as a plain-text TOML file", source=path) from None
    if not text.strip():
        raise InputError("is empty; see the file references in docs/ (model-file.md, series-file.md)", source=path)
    try:
        return tomllib.loads(text)
    except RecursionError:  # tables or arrays nested thousands deep
        raise InputError("is nested too deeply (tables or arrays inside each other); a dnmr input file is "
                         "at most a few levels deep", source=path) from None
    except tomllib.TOMLDecodeError as err:
        msg = str(err)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        where = f"line {m.group(1)}" if m else None
        detail = re.sub(r"\s*\(at line \d+, column \d+\)", "", msg)
        raise InputError(f"TOML syntax error: {detail}", source=path, where=where) from None


def check_keys(table: Any, allowed: set[str], where: str, required: tuple[str, ...] = ()) -> dict:
    """Check that `table` is a table with only `allowed` keys and every `required` one."""
    if not isinstance(table, dict):
        raise InputError(f"expected a table, got {type(table).__name__}", where=where or None)
    for key in table:
        if key not in allowed:
            prefix = f"{where}." if where else ""
            raise InputError(
                f'unknown key "{key}"{did_you_mean(key, allowed)}; allowed: {", ".join(sorted(allowed))}',
                where=f"{prefix}{key}")
    for key in required:
        if key not in table:
            prefix = f"{where}." if where else ""
            raise InputError(f'missing key "{key}"', where=f"{prefix}{key}")
    return table


def _number(table: dict, key: str, where: str, default=None):
    if key not in table:
        return default
    value = table[key]
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(f"expected a finite number, got {value!r}", where=f"{where}.{key}")
    return float(value)


def _text(table: dict, key: str, where: str, default=None):
    if key not in table:
        return default
    value = table[key]
    if not isinstance(value, str) or not value.strip():
        raise InputError(f"expected non-empty text, got {value!r}", where=f"{where}.{key}")
    return value.strip()


def _table_of(table: dict, key: str, where: str, kind: type, default=None) -> dict:
    value = table.get(key, default if default is not None else {})
    if not isinstance(value, dict):
        raise InputError(f"expected an inline table such as {{ Ha = 3.1 }}, got {value!r}", where=f"{where}.{key}")
    for k, v in value.items():
        ok = isinstance(v, str) if kind is str else (isinstance(v, (int, float)) and not isinstance(v, bool))
        if not ok or (kind is float and not math.isfinite(v)):
            expected = "a spin name" if kind is str else "a finite number"
            raise InputError(f"expected {expected}, got {v!r}", where=f"{where}.{key}.{k}")
    return value


def _array_of_tables(data: dict, key: str) -> list[dict]:
    value = data.get(key, [])
    if isinstance(value, dict):
        raise InputError(f"write [[{key}]] (double brackets) for each entry", where=key)
    if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
        raise InputError(f"expected [[{key}]] tables", where=key)
    return value


def _named_table(data: dict, key: str, example: str) -> dict:
    value = data.get(key, {})
    if not isinstance(value, dict):
        raise InputError(f"expected a table of names, e.g. [{key}] then {example}", where=key)
    return value


def parse_groups(data: dict) -> dict[str, int]:
    """The ``[groups]`` table: spin name -> number of magnetically equivalent nuclei (a whole number)."""
    table = _named_table(data, "groups", "Me = 3")
    for name, count in table.items():
        if isinstance(count, bool) or not isinstance(count, int):
            raise InputError(f"expected the number of nuclei in the group, e.g. {name} = 3, got {count!r}",
                             where=f"groups.{name}")
    return dict(table)


def parse_heteronuclei(data: dict) -> dict[str, str]:
    """The ``[heteronuclei]`` table: spin name -> isotope in isotope notation (``F1 = "19F"``)."""
    table = _named_table(data, "heteronuclei", 'F1 = "19F"')
    for name, symbol in table.items():
        if not isinstance(symbol, str):
            raise InputError(f'expected an isotope in quotes, e.g. {name} = "19F", got {symbol!r}',
                             where=f"heteronuclei.{name}")
    return dict(table)


def parse_state(table: dict, index: int) -> State:
    """One ``[[state]]`` table into a :class:`State`."""
    where = f"state[{index}]"
    check_keys(table, STATE_KEYS, where, required=("name", "shifts_ppm"))
    return State(
        name=_text(table, "name", where),
        shifts_ppm=_table_of(table, "shifts_ppm", where, float),
        couplings_hz=_table_of(table, "couplings_hz", where, float),
        linewidth_hz=_number(table, "linewidth_hz", where, 1.0),
        population=_number(table, "population", where),
        free_energy_kj_mol=_number(table, "free_energy_kj_mol", where),
        r1_per_s=(_table_of(table, "r1_per_s", where, float) if isinstance(table.get("r1_per_s"), dict)
                  else _number(table, "r1_per_s", where)),
    )


def parse_exchange(table: dict, index: int) -> Exchange:
    """One ``[[exchange]]`` table into an :class:`Exchange`."""
    where = f"exchange[{index}]"
    check_keys(table, EXCHANGE_KEYS, where, required=("from", "to"))
    return Exchange(
        from_state=_text(table, "from", where),
        to_state=_text(table, "to", where),
        spins=_table_of(table, "spins", where, str),
        rate_per_s=_number(table, "rate_per_s", where),
        barrier_kj_mol=_number(table, "barrier_kj_mol", where),
        enthalpy_kj_mol=_number(table, "enthalpy_kj_mol", where),
        entropy_j_mol_k=_number(table, "entropy_j_mol_k", where),
        name=_text(table, "name", where),
    )


def _with_place(where: str, error: InputError) -> InputError:
    """Prefix the key of an error raised inside a state/exchange with that entry's place."""
    inner = error.where
    if inner and (inner.startswith("state") or inner.startswith("exchange") or inner.startswith("conditions")
                  or inner.startswith("spectrometer") or inner.startswith("window")):
        return error
    return InputError(error.message, where=f"{where}.{inner}" if inner else where)


def model_from_dict(data: dict, source: str | None = None) -> Model:
    """Build a :class:`Model` from the parsed TOML tables (raises InputError naming the key); `source` is
    the file, kept for later messages."""
    check_keys(data, TOP_KEYS, "", required=("spectrometer", "state"))
    spec = check_keys(data["spectrometer"], SPECTROMETER_KEYS, "spectrometer", required=("frequency_mhz",))
    window = check_keys(data.get("window", {}), WINDOW_KEYS, "window")
    conditions = check_keys(data.get("conditions", {}), CONDITIONS_KEYS, "conditions")
    window_ppm = window.get("ppm")
    if window_ppm is not None and (not isinstance(window_ppm, list) or len(window_ppm) != 2):
        raise InputError("expected two limits, e.g. ppm = [2.5, 3.8]", where="window.ppm")
    points = window.get("points")
    if points is not None and (isinstance(points, bool) or not isinstance(points, int)):
        raise InputError(f"expected a whole number of points, got {points!r}", where="window.points")
    states = []
    for i, table in enumerate(_array_of_tables(data, "state")):
        try:
            states.append(parse_state(table, i))
        except InputError as err:
            raise _with_place(f"state[{i}]", err) from None
    exchanges = []
    for i, table in enumerate(_array_of_tables(data, "exchange")):
        try:
            exchanges.append(parse_exchange(table, i))
        except InputError as err:
            raise _with_place(f"exchange[{i}]", err) from None
    title = data.get("title", "")
    if not isinstance(title, str):
        raise InputError("expected text", where="title")
    return Model(
        spectrometer=Spectrometer(
            frequency_mhz=_number(spec, "frequency_mhz", "spectrometer"),
            nucleus=_text(spec, "nucleus", "spectrometer", "1H"),
        ),
        states=tuple(states),
        exchanges=tuple(exchanges),
        temperature_k=_number(conditions, "temperature_k", "conditions"),
        window_ppm=None if window_ppm is None else tuple(window_ppm),
        points=points,
        title=title,
        groups=parse_groups(data),
        heteronuclei=parse_heteronuclei(data),
        source=source,
    )


def load_model(path: str | Path) -> Model:
    """Read a model file (TOML) into a :class:`Model`.

    Parameters
    ----------
    path : str or Path
        The model file.

    Raises
    ------
    InputError
        With the file name and the offending key, for any problem.
    """
    from dnmr.engine.blocks import check_model_size

    data = read_toml(path)
    try:
        model = model_from_dict(data, source=str(path))
        check_model_size(model)
    except InputError as err:
        raise err.located(source=path) from None
    return model
