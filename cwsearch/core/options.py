"""One source for every option: a dataclass field carries its name, default and help; the command line and
the run file are built from it.

Each stage's frozen ``Options`` dataclass (``cwsearch/stages/<stage>/options.py``) and the run-level
:class:`~cwsearch.physics.noise_settings.NoiseSettings` make their fields with :func:`option`. The field
name is the run-file key; the command-line option is the same name with dashes (``null_sims`` is
``--null-sims``), or ``--no-NAME`` for a switch that is on by default. :func:`add_options` adds the
argparse arguments of a class, :func:`options_from_args` builds the class back from parsed arguments,
and :mod:`cwsearch.job.config` reads the same fields for the run-file schema, so a new field is a new
command-line option and a new run-file key at once, with one default and one help text.

A field that only one of the two can set says so, with the reason (``only="cli"`` or ``only="file"``,
``why=...``); ``tests/test_options.py`` walks every field and checks both routes.

Standard library only, so ``cwsearch COMMAND --help`` stays fast.

Examples
--------
>>> import argparse
>>> from dataclasses import dataclass
>>> @dataclass(frozen=True)
... class Demo:
...     nside: int = option(8, "HEALPix resolution")
...     plots: bool = option(True, "draw the plots", cli_help="do not draw the plots")
>>> parser = argparse.ArgumentParser()
>>> add_options(parser, Demo)
>>> options_from_args(Demo, parser.parse_args(["--nside", "4", "--no-plots"]))
Demo(nside=4, plots=False)
>>> options_from_args(Demo, parser.parse_args([]))
Demo(nside=8, plots=True)
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
import types
import typing
from dataclasses import dataclass

#: ``only`` values: the field is set on the command line only, or in the run file only
CLI_ONLY = "cli"
FILE_ONLY = "file"


def option(default, help, *, cli_help=None, flag=None, aliases=(), dest=None, metavar=None, group=None,
           only=None, why="", show_default=None, argtype=None, nargs=None, required=False):
    """A dataclass field with its option metadata.

    Parameters
    ----------
    default : the default (one for the command line, the run file and the Python API)
    help : what the field means (the run file's comment; the command-line help unless ``cli_help``)
    cli_help : command-line help where it must differ (a ``--no-NAME`` switch says what turning it off does)
    flag : the command-line option (default ``--NAME`` with dashes; ``--no-NAME`` for a switch on by default)
    aliases : older spellings still accepted on the command line
    dest : the argparse destination (default: the field name)
    metavar, nargs, argtype, required : passed to argparse (``argtype`` is its ``type``)
    group : title of the help section the option is listed under
    only : ``"cli"`` or ``"file"`` when only one route sets the field; ``why`` says why
    show_default : how the help shows the default (``""``: not at all; default: the value itself)
    """
    if only not in (None, CLI_ONLY, FILE_ONLY):
        raise ValueError(f"only must be None, {CLI_ONLY!r} or {FILE_ONLY!r}, not {only!r}")
    if only and not why:
        raise ValueError("a field set by one route only needs the reason (why=...)")
    metadata = {"help": help, "cli_help": cli_help, "flag": flag, "aliases": tuple(aliases), "dest": dest,
                "metavar": metavar, "group": group, "only": only, "why": why, "show_default": show_default,
                "argtype": argtype, "nargs": nargs, "required": required}
    return dataclasses.field(default=default, metadata={"option": metadata})


@dataclass(frozen=True)
class OptionSpec:
    """One field of an options class, as the command line and the run file see it."""

    name: str
    default: object
    hint: object
    help: str
    cli_help: str
    flags: tuple
    dest: str
    metavar: object
    group: str | None
    only: str | None
    why: str
    show_default: str | None
    argtype: object
    nargs: object
    required: bool

    @property
    def on_cli(self) -> bool:
        """The command line can set it."""
        return self.only != FILE_ONLY

    @property
    def in_file(self) -> bool:
        """The run file can set it (key = :attr:`name`)."""
        return self.only != CLI_ONLY

    @property
    def flag(self) -> str:
        """The command-line option (the first of :attr:`flags`)."""
        return self.flags[0]


def _base(hint):
    """The type hint without ``None`` (``float | None`` -> ``float``)."""
    if typing.get_origin(hint) in (typing.Union, types.UnionType):
        args = [a for a in typing.get_args(hint) if a is not type(None)]
        if len(args) == 1:
            return args[0]
        return typing.Union[tuple(args)]
    return hint


def type_hints(cls) -> dict:
    """The resolved type hints of a dataclass (its module's names, e.g. ``Literal``)."""
    module = sys.modules.get(cls.__module__)
    return typing.get_type_hints(cls, globalns=vars(module) if module else None)


def option_specs(cls) -> list:
    """The :class:`OptionSpec` of every init field of ``cls`` (fields without :func:`option` metadata
    get plain defaults: the name with dashes, no help)."""
    hints = type_hints(cls)
    specs = []
    for f in dataclasses.fields(cls):
        if not f.init or f.name.startswith("_"):
            continue
        meta = dict(f.metadata.get("option") or {"help": f.metadata.get("help", "")})
        if f.default is not dataclasses.MISSING:
            default = f.default
        elif f.default_factory is not dataclasses.MISSING:  # type: ignore[misc]
            default = f.default_factory()  # type: ignore[misc]
        else:
            default = dataclasses.MISSING
        hint = hints.get(f.name, object)
        dashed = f.name.replace("_", "-")
        flag = meta.get("flag") or (f"--no-{dashed}" if _base(hint) is bool and default is True else f"--{dashed}")
        specs.append(OptionSpec(
            name=f.name, default=default, hint=hint, help=meta.get("help") or "",
            cli_help=meta.get("cli_help") or meta.get("help") or "",
            flags=(flag, *meta.get("aliases", ())), dest=meta.get("dest") or f.name, metavar=meta.get("metavar"),
            group=meta.get("group"), only=meta.get("only"), why=meta.get("why", ""),
            show_default=meta.get("show_default"), argtype=meta.get("argtype"), nargs=meta.get("nargs"),
            required=bool(meta.get("required"))))
    return specs


def choices_of(hint) -> tuple:
    """The allowed values of a ``Literal[...]`` hint (optionally ``| None``), else ``()``."""
    hint = _base(hint)
    return typing.get_args(hint) if typing.get_origin(hint) is typing.Literal else ()


def _default_text(spec) -> str:
    if spec.show_default is not None:
        return spec.show_default
    v = spec.default
    if v is None or isinstance(v, bool) or v == () or v is dataclasses.MISSING:
        return ""
    return number_text(v) if isinstance(v, float) else str(v)


def number_text(value: float) -> str:
    """A float as the help shows it: ``%g`` without exponent padding (``1e-7``, ``1e6``, ``0.5``, ``180``)."""
    text = format(value, "g")
    mantissa, e, exponent = text.partition("e")
    return f"{mantissa}e{int(exponent)}" if e else text


def argument_group(parser, title):
    """The argument group ``title`` of ``parser`` (created the first time)."""
    if title is None or not isinstance(parser, argparse.ArgumentParser):
        return parser   # a group given by the caller keeps all of them
    groups = parser.__dict__.setdefault("_cwsearch_groups", {})
    if title not in groups:
        groups[title] = parser.add_argument_group(title)
    return groups[title]


def add_options(parser, cls, *, exclude=(), include=None, group=None):
    """Add the command-line options of every field of ``cls`` (only those in ``include`` when given; never
    those in ``exclude`` or file-only ones) to ``parser`` (an argparse parser or group); ``group`` is the
    help section of fields that name none."""
    for spec in option_specs(cls):
        if not spec.on_cli or spec.name in exclude or (include is not None and spec.name not in include):
            continue
        base = _base(spec.hint)
        shown = _default_text(spec)
        text = spec.cli_help + (f" (default {shown})" if shown else "")
        kwargs = {"dest": spec.dest, "help": text.replace("%", "%%")}
        if base is bool:
            kwargs["action"] = "store_false" if spec.default is True else "store_true"
        else:
            kwargs["default"] = spec.default
            choices = choices_of(spec.hint)
            origin = typing.get_origin(base)
            if choices:
                kwargs["choices"] = choices
                kwargs["type"] = spec.argtype or type(choices[0])
            elif origin is tuple or base is tuple:
                kwargs["action"] = "append"
                kwargs["default"] = None
                item = (typing.get_args(base) or (str,))[0]
                fixed = typing.get_args(item) if typing.get_origin(item) is tuple else ()
                if fixed and fixed[-1] is not Ellipsis:
                    kwargs["nargs"] = len(fixed)   # each item: several values, converted by the options' check
                kwargs["type"] = spec.argtype or (str if fixed else item)
            elif base in (int, float, str):
                kwargs["type"] = spec.argtype or base
            elif spec.argtype is not None:
                kwargs["type"] = spec.argtype
            for key in ("metavar", "nargs"):
                if getattr(spec, key) is not None:
                    kwargs[key] = getattr(spec, key)
            if spec.required:
                kwargs["required"] = True
        argument_group(parser, spec.group or group).add_argument(*spec.flags, **kwargs)


def options_from_args(cls, args, *, exclude=(), **values):
    """``cls`` from parsed arguments: every command-line field not in ``exclude`` from ``args`` (repeated
    options become tuples), the others their defaults unless given in ``values``."""
    for spec in option_specs(cls):
        if spec.name in values or spec.name in exclude or not spec.on_cli or not hasattr(args, spec.dest):
            continue
        value = getattr(args, spec.dest)
        if isinstance(value, list):
            value = tuple(tuple(v) if isinstance(v, list) else v for v in value)
        elif value is None and isinstance(spec.default, tuple):
            value = spec.default
        values[spec.name] = value
    return cls(**values)


__all__ = ["option", "OptionSpec", "option_specs", "add_options", "options_from_args", "choices_of",
           "type_hints", "argument_group", "number_text", "CLI_ONLY", "FILE_ONLY"]
