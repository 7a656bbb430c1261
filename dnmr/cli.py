"""The ``dnmr`` command line: a thin layer over the Python API.

Every command turns :class:`dnmr.errors.InputError` into one line on stderr and exit status 2
(``--debug`` shows the traceback instead); any other failure exits 1.
"""
from __future__ import annotations

import json
import sys
import traceback
from pathlib import Path

import click

from .errors import InputError


class _Group(click.Group):
    """Click group that maps errors onto the exit statuses of the contract (0 ok, 2 bad input, 1 other)."""

    def invoke(self, ctx: click.Context):
        try:
            return super().invoke(ctx)
        except InputError as err:
            if ctx.obj and ctx.obj.get("debug"):
                traceback.print_exc()
            click.echo(f"dnmr: error: {err}", err=True)
            ctx.exit(2)


@click.group(cls=_Group)
@click.option("--debug", is_flag=True, help="Show the full traceback of an error.")
@click.version_option(package_name="dnmr")
@click.pass_context
def cli(ctx: click.Context, debug: bool) -> None:
    """dnmr: dynamic NMR lineshapes, exchange rates from VT spectra, and activation parameters."""
    ctx.ensure_object(dict)
    ctx.obj["debug"] = debug


def print_json(obj) -> None:
    """Print one JSON object on stdout (NaN written as null)."""
    click.echo(json.dumps(_json_safe(obj), indent=2))


def _json_safe(obj):
    if isinstance(obj, dict):
        return {str(k): _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_safe(v) for v in obj]
    if hasattr(obj, "item") and not isinstance(obj, (str, bytes)):
        obj = obj.item()
    if isinstance(obj, float) and obj != obj:
        return None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def main(argv: list[str] | None = None) -> None:
    """Entry point of the ``dnmr`` console script."""
    try:
        cli.main(args=argv, prog_name="dnmr", standalone_mode=True)
    except SystemExit:
        raise
    except Exception:  # pragma: no cover - last resort, keeps exit status 1
        traceback.print_exc()
        sys.exit(1)
