"""NMR solvents and their liquid ranges: a built-in table of common deuterated solvents plus your own.

A variable-temperature series is only as good as the solvent that stays liquid through it.  The table
holds melting and boiling points at atmospheric pressure (degrees Celsius, as suppliers' charts quote
them; from memory of those charts, so check the data sheet of the bottle you use).  A solution freezes
a little lower than the pure solvent and can supercool; it does not boil any later in a sealed tube,
it builds pressure instead.

User-defined solvents come from the command line (melting and boiling point in K) or from a small
TOML file::

    [[solvent]]
    name = "my freon mixture"
    melting_point_k = 130.0         # or melting_point_c
    boiling_point_k = 290.0         # or boiling_point_c
"""
from __future__ import annotations

import difflib
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from dnmr.errors import InputError

CELSIUS_ZERO_K = 273.15
#: Temperatures this close (K) to freezing or boiling get a warning (common practice: keep ~10 K away).
DEFAULT_MARGIN_K = 10.0

HANDBOOK_NOTE = ("melting and boiling points at 1 atm of the deuterated solvents, as in suppliers' charts"
                 " (from memory; check the data sheet of your bottle)")


@dataclass(frozen=True)
class Solvent:
    """A solvent's liquid range.

    Parameters
    ----------
    name : str
        Name used in reports.
    melting_point_k : float
        Melting point (K).
    boiling_point_k : float
        Boiling point at atmospheric pressure (K).
    aliases : tuple of str
        Other names it is looked up by (formulae such as ``"CDCl3"``).
    source : str
        Where the numbers come from.
    """

    name: str
    melting_point_k: float
    boiling_point_k: float
    aliases: tuple[str, ...] = field(default=())
    source: str = "user-defined"

    def __post_init__(self):
        for key in ("melting_point_k", "boiling_point_k"):
            value = getattr(self, key)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value <= 0:
                raise InputError(f"{key} must be a positive temperature in kelvin, got {value!r}", where=key)
        if not self.melting_point_k < self.boiling_point_k:
            raise InputError(
                f"the melting point ({self.melting_point_k:g} K) must lie below the boiling point"
                f" ({self.boiling_point_k:g} K)", where="melting_point_k")

    def liquid_range_k(self, margin_k: float = DEFAULT_MARGIN_K) -> tuple[float, float]:
        """Temperatures (K) at least `margin_k` (K) above freezing and below boiling."""
        return self.melting_point_k + margin_k, self.boiling_point_k - margin_k

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready), temperatures in K and degrees Celsius."""
        return {
            "name": self.name,
            "melting_point_k": self.melting_point_k,
            "boiling_point_k": self.boiling_point_k,
            "melting_point_c": self.melting_point_k - CELSIUS_ZERO_K,
            "boiling_point_c": self.boiling_point_k - CELSIUS_ZERO_K,
            "source": self.source,
        }


def _handbook(name: str, aliases: Sequence[str], melting_c: float, boiling_c: float) -> Solvent:
    return Solvent(name, melting_c + CELSIUS_ZERO_K, boiling_c + CELSIUS_ZERO_K, tuple(aliases), HANDBOOK_NOTE)


#: Common deuterated NMR solvents: name, aliases, melting point (deg C), boiling point (deg C).
BUILTIN_SOLVENTS: tuple[Solvent, ...] = tuple(_handbook(*row) for row in (
    ("chloroform-d", ("CDCl3", "deuterochloroform"), -64.0, 61.0),
    ("dichloromethane-d2", ("CD2Cl2", "methylene chloride-d2"), -95.0, 40.0),
    ("acetone-d6", ("(CD3)2CO",), -94.0, 56.0),
    ("methanol-d4", ("CD3OD",), -98.0, 65.0),
    ("dimethyl sulfoxide-d6", ("DMSO-d6", "(CD3)2SO"), 18.5, 189.0),
    ("toluene-d8", ("C6D5CD3",), -95.0, 111.0),
    ("tetrahydrofuran-d8", ("THF-d8",), -108.5, 66.0),
    ("acetonitrile-d3", ("CD3CN",), -45.0, 82.0),
    ("deuterium oxide", ("D2O", "heavy water"), 3.8, 101.4),
    ("benzene-d6", ("C6D6",), 6.8, 79.1),
    ("N,N-dimethylformamide-d7", ("DMF-d7",), -61.0, 153.0),
    ("pyridine-d5", ("C5D5N",), -42.0, 115.0),
    ("nitrobenzene-d5", ("C6D5NO2",), 6.0, 211.0),
    ("1,2-dichlorobenzene-d4", ("o-dichlorobenzene-d4", "ODCB-d4", "C6D4Cl2"), -17.0, 180.0),
    ("chlorobenzene-d5", ("C6D5Cl",), -45.0, 132.0),
    ("cyclohexane-d12", ("C6D12",), 6.5, 81.0),
    ("methylcyclohexane-d14", ("C7D14",), -126.0, 101.0),
    ("acetic acid-d4", ("CD3CO2D", "CD3COOD"), 16.6, 118.0),
    ("trifluoroacetic acid-d", ("TFA-d", "CF3CO2D", "CF3COOD"), -15.0, 72.0),
    ("1,4-dioxane-d8", ("dioxane-d8",), 11.8, 101.0),
    ("diethyl ether-d10", ("ether-d10", "(CD3CD2)2O"), -116.0, 35.0),
    ("nitromethane-d3", ("CD3NO2",), -29.0, 101.0),
))


def _key(name: str) -> str:
    """Lookup key: case, blanks, hyphens and underscores do not matter."""
    return "".join(ch for ch in name.lower() if not ch.isspace() and ch not in "-_")


def solvent(name: str, extra: Iterable[Solvent] = ()) -> Solvent:
    """Look up a solvent by name or alias (``"CDCl3"``, ``"dmso-d6"``), user-defined ones first.

    Parameters
    ----------
    name : str
        Name or alias; case, blanks, hyphens and underscores do not matter.
    extra : iterable of Solvent
        User-defined solvents, searched before the built-in table.

    Raises
    ------
    InputError
        For an unknown name, with the closest known one.
    """
    table: dict[str, tuple[Solvent, str]] = {}
    for entry in (*extra, *BUILTIN_SOLVENTS):
        for label in (entry.name, *entry.aliases):
            table.setdefault(_key(label), (entry, label))
    found = table.get(_key(name))
    if found is None:
        close = difflib.get_close_matches(_key(name), list(table), n=1, cutoff=0.6)
        hint = f' (did you mean "{table[close[0]][1]}"?)' if close else ""
        raise InputError(
            f'unknown solvent "{name}"{hint}; give its melting and boiling points'
            " (--melting-point-k, --boiling-point-k) or a solvent file", where="solvent")
    return found[0]


def _temperature_k(table: dict, key: str, where: str) -> float:
    """``key_k`` (K) or ``key_c`` (deg C) of a solvent table, exactly one of them."""
    given = [suffix for suffix in ("_k", "_c") if key + suffix in table]
    if len(given) != 1:
        raise InputError(f"give exactly one of {key}_k or {key}_c", where=f"{where}.{key}_k")
    value = table[key + given[0]]
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(f"expected a number, got {value!r}", where=f"{where}.{key}{given[0]}")
    return float(value) + (CELSIUS_ZERO_K if given[0] == "_c" else 0.0)


def load_solvents(path: str | Path) -> list[Solvent]:
    """Read user-defined solvents from a TOML file of ``[[solvent]]`` tables (see the module notes).

    Raises
    ------
    InputError
        Naming the file and the key, for any problem.
    """
    from dnmr.io.modelfile import check_keys, read_toml

    data = read_toml(path)
    try:
        check_keys(data, {"solvent"}, "", required=("solvent",))
        tables = data["solvent"]
        if not isinstance(tables, list) or not tables:
            raise InputError("write one [[solvent]] table (double brackets) per solvent", where="solvent")
        allowed = {"name", "melting_point_k", "melting_point_c", "boiling_point_k", "boiling_point_c"}
        solvents = []
        for i, table in enumerate(tables):
            where = f"solvent[{i}]"
            check_keys(table, allowed, where, required=("name",))
            name = table["name"]
            if not isinstance(name, str) or not name.strip():
                raise InputError("expected a non-empty name", where=f"{where}.name")
            try:
                solvents.append(Solvent(name.strip(), _temperature_k(table, "melting_point", where),
                                        _temperature_k(table, "boiling_point", where), source=f"user-defined ({path})"))
            except InputError as err:
                raise err.located(where=where) from None
    except InputError as err:
        raise err.located(source=path) from None
    return solvents


@dataclass(frozen=True)
class SolventWarning:
    """A temperature that is outside, or close to the edge of, a solvent's liquid range.

    Attributes
    ----------
    temperature_k : float
        The temperature (K).
    kind : str
        ``"frozen"``, ``"near freezing"``, ``"above boiling"`` or ``"near boiling"``.
    message : str
        What it means for the sample.
    """

    temperature_k: float
    kind: str
    message: str

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready)."""
        return {"temperature_k": self.temperature_k, "kind": self.kind, "message": self.message}


def check_temperature(solvent: Solvent, temperature_k: float, margin_k: float = DEFAULT_MARGIN_K) -> SolventWarning | None:
    """A warning when `temperature_k` (K) is outside `solvent`'s liquid range or within `margin_k` (K) of it."""
    t, mp, bp = float(temperature_k), solvent.melting_point_k, solvent.boiling_point_k
    name = solvent.name
    if t < mp:
        return SolventWarning(t, "frozen", f"{t:.1f} K is below the melting point of {name} ({mp:.1f} K):"
                              " the sample freezes (and can crack the tube)")
    if t > bp:
        return SolventWarning(t, "above boiling", f"{t:.1f} K is above the boiling point of {name} ({bp:.1f} K):"
                              " an open tube boils dry and a sealed tube builds pressure and can burst")
    if t < mp + margin_k:
        return SolventWarning(t, "near freezing", f"{t:.1f} K is within {margin_k:g} K of the melting point of"
                              f" {name} ({mp:.1f} K): viscosity rises, lines broaden, the sample may freeze")
    if t > bp - margin_k:
        return SolventWarning(t, "near boiling", f"{t:.1f} K is within {margin_k:g} K of the boiling point of"
                              f" {name} ({bp:.1f} K): bubbles, evaporation and pressure in a sealed tube")
    return None


def check_temperatures(solvent: Solvent, temperatures_k: Iterable[float],
                       margin_k: float = DEFAULT_MARGIN_K) -> list[SolventWarning]:
    """Warnings (see :func:`check_temperature`) for every temperature (K) that needs one."""
    found = (check_temperature(solvent, t, margin_k) for t in temperatures_k)
    return [w for w in found if w is not None]


def solvents_covering(low_k: float, high_k: float, margin_k: float = DEFAULT_MARGIN_K,
                      extra: Iterable[Solvent] = ()) -> list[Solvent]:
    """Solvents (user-defined first, then built-in) liquid from `low_k` to `high_k` (K) with `margin_k` (K) to spare."""
    return [s for s in (*extra, *BUILTIN_SOLVENTS)
            if s.liquid_range_k(margin_k)[0] <= low_k and high_k <= s.liquid_range_k(margin_k)[1]]


def solvent_from_options(name: str | None = None, path: str | Path | None = None,
                         melting_point_k: float | None = None, boiling_point_k: float | None = None) -> Solvent | None:
    """The solvent a user asked for: their own melting and boiling points (K), or a name looked up in
    their solvent file (`path`) and then the built-in table; None when nothing was asked.

    Raises
    ------
    InputError
        For half a liquid range, a file without a name, or an unknown name.
    """
    if (melting_point_k is None) != (boiling_point_k is None):
        missing = "--boiling-point-k" if boiling_point_k is None else "--melting-point-k"
        raise InputError("give both the melting and the boiling point (K) of your solvent", where=missing)
    if melting_point_k is not None:
        return Solvent(name or "user-defined solvent", float(melting_point_k), float(boiling_point_k))
    if name is None:
        if path is not None:
            raise InputError("name the solvent to use from the file with --solvent", where="--solvent")
        return None
    return solvent(name, load_solvents(path) if path is not None else ())
