"""What every command-line module shares: the ``app``, printing, list options and renamed options.

:mod:`probeseq.cli` and :mod:`probeseq.cli.stages` both import this module and neither imports
the other at module level, so the command-line layer has no import cycle.
"""

from __future__ import annotations

import sys
from typing import Annotated, Optional

import typer

from .._version import __version__
from ..exceptions import InputError

__all__ = ['app', 'say', 'split_list', 'deprecated_option', 'renamed', 'RENAMED_OPTIONS']

app = typer.Typer(
    name="probeseq",
    help="Read the metal sequence along the rods of mixed-metal framework crystals from "
         "atom-probe tomography ion lists.",
    add_completion=False,
    no_args_is_help=True,
    rich_markup_mode=None,
    pretty_exceptions_enable=False,
    # a wide help page, so that no command's one-line summary is cut short
    context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 200},
)


_STATE = {"quiet": False, "verbose": False}


#: renamed options: command -> ((old name, new name), ...); the old names still work (hidden)
RENAMED_OPTIONS = {
    "simulate": (("--eta", "--detection-efficiency"), ("--sigma-xy", "--lateral-blur"),
                 ("--sigma-z", "--depth-blur"), ("--top-radius", "--tip-radius"), ("--packing", "--lattice")),
    "plan": (("--efficiency", "--detection-efficiency"), ("--lateral-resolution", "--lateral-blur"),
             ("--radius", "--tip-radius")),
    "export": (("--depth", "--depth-window"),),
}


def _version(value: bool):
    if value:
        typer.echo(f"probeseq {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: Annotated[Optional[bool], typer.Option("--version", callback=_version, is_eager=True,
                                                    help="Print the version and exit.")] = None,
    jobs: Annotated[Optional[int], typer.Option(
        "--jobs", metavar="N", show_default=False,
        help="Threads for compiled kernels and worker processes for batches; default: all cores "
             "(batch folders and plan: a local dask cluster with one worker per core, or 2 worker "
             "processes without dask). Give it before the command, e.g. 'probeseq --jobs 2 analyze ...'.")] = None,
):
    """probeseq: from a reconstructed ion list to the metal sequence along each rod."""
    from .. import runtime

    runtime.configure(n_jobs=jobs)


def say(msg: str = ""):
    """Print a line to standard output unless --quiet."""
    if not _STATE["quiet"]:
        typer.echo(msg)


def split_list(value: Optional[str], what: str) -> list:
    """Split a comma-separated option value; empty items are an error."""
    if value is None:
        return []
    items = [v.strip() for v in value.split(",")]
    if any(not v for v in items):
        raise InputError(f"{what}: empty item in '{value}' (give a comma-separated list, e.g. Co,Zn)")
    return items


def deprecated_option(old: str, new: str):
    """A hidden option under a renamed option's old name.

    It takes the same value as ``new`` (default None, so a command can tell whether it was
    given) and prints ``note: OLD is deprecated; use NEW`` to standard error once when used.
    Merge it with :func:`renamed`.

    Parameters
    ----------
    old, new : str
        The old and the new option name, with the leading ``--``.
    """

    def note(value):
        if value is not None:
            sys.stderr.write(f"note: {old} is deprecated; use {new}\n")
        return value

    return typer.Option(old, hidden=True, callback=note, show_default=False)


def renamed(ctx: typer.Context, new: str, value, old: str, old_value):
    """The value of a renamed option, given under its new or its (deprecated) old name.

    Parameters
    ----------
    ctx : typer.Context
        The command's context (to tell a given value from the default).
    new : str
        The new option name, e.g. ``--detection-efficiency``.
    value : object
        The value under the new name (its default when not given).
    old : str
        The old option name, e.g. ``--eta``.
    old_value : object or None
        The value under the old name; None when not given.

    Returns
    -------
    object
        ``old_value`` when the old name was given, else ``value``.

    Raises
    ------
    InputError
        When both names were given.
    """
    if old_value is None:
        return value
    source = ctx.get_parameter_source(new.lstrip("-").replace("-", "_"))
    if source is not None and source.name == "COMMANDLINE":
        raise InputError(f"{new} and {old} are the same option ({old} is its deprecated name); give {new} only")
    return old_value


# ---------------------------------------------------------------------- readable help
#: how the value placeholders of options read in --help (the command-line layer's own are <type>)
_METAVARS = {"str": "TEXT", "float": "NUMBER", "int": "INTEGER", "path": "PATH", "bool": "BOOLEAN"}


def _argument_name(param) -> str:
    """An argument as the usage line and --help show it: ``IONS``, ``[NAME]``, ``OUTDIRS...``."""
    name = (param.metavar or param.name).upper()
    if not param.required:
        name = f"[{name}]"
    return name + ("..." if param.nargs != 1 else "")


class ReadableCommand(typer.core.TyperCommand):
    """A command whose --help reads plainly: arguments as ``IONS`` (not ``{ions}``) in the usage
    line and the argument list, option values as ``TEXT``, ``NUMBER``, ``INTEGER`` or ``PATH``
    unless the option names its own placeholder."""

    def collect_usage_pieces(self, ctx) -> list:
        """``[OPTIONS]`` and the arguments by name."""
        rv = [self.options_metavar] if self.options_metavar else []
        for p in self.get_params(ctx):
            rv.extend([_argument_name(p)] if p.param_type_name == "argument" else p.get_usage_pieces(ctx))
        return rv

    def format_options(self, ctx, formatter) -> None:
        """The Arguments and Options sections, with readable placeholders."""
        import re

        args, opts = [], []
        for p in self.get_params(ctx):
            rec = p.get_help_record(ctx)
            if rec is None:
                continue
            if p.param_type_name == "argument":
                args.append((_argument_name(p), rec[1]))
            elif p.param_type_name == "option":
                opts.append((re.sub(r"<(\w+)>", lambda m: _METAVARS.get(m.group(1), m.group(1).upper()), rec[0]),
                             rec[1]))
        for title, rows in (("Arguments", args), ("Options", opts)):
            if rows:
                with formatter.section(title):
                    formatter.write_dl(rows)
