"""Command-line options built from the options classes of :mod:`drift.options`.

A command declares a parameter annotated with an options class (``train: TrainOptions``);
:func:`command` replaces it by one typer option per field (name, default, help and metavar from
the field) and hands the command a checked options object. Fields of several classes that share
a command-line name (``--between``, ``--seed``, ``--top`` in ``drift run``) become one option
that feeds all of them.
"""

from __future__ import annotations

import dataclasses
import inspect
import types
import typing
from collections.abc import Callable
from typing import Any

import typer

from drift.cli.app import app
from drift.options import StageOptions, flag_of


def _parsed_type(item: dataclasses.Field, hints: dict[str, Any]) -> Any:
    """The type the command line parses for a field: ``cli_type``, else the field's type
    without ``None``."""
    if item.metadata.get("cli_type") is not None:
        return item.metadata["cli_type"]
    hint = hints[item.name]
    if isinstance(hint, types.UnionType) or typing.get_origin(hint) is typing.Union:
        args = [arg for arg in typing.get_args(hint) if arg is not type(None)]
        hint = args[0]
    return hint


#: How the help shows the value of an option with no metavar of its own.
_METAVARS: dict[Any, str] = {int: "N", float: "X", str: "TEXT"}


def _param_name(flag: str) -> str:
    return flag.lstrip("-").replace("-", "_")


@dataclasses.dataclass
class _Option:
    """One command-line option and the options fields it feeds."""

    flag: str
    parameter: inspect.Parameter
    targets: list[tuple[str, str]]  # (command parameter, field name)
    negate: bool
    old: inspect.Parameter | None = None  # former spelling, hidden from the help


def _options_for(groups: dict[str, type[StageOptions]], only: str | None = None) -> list[_Option]:
    merged: dict[str, _Option] = {}
    for group, cls in groups.items():
        hints = typing.get_type_hints(cls)
        for item in dataclasses.fields(cls):  # type: ignore[arg-type]
            if only is not None and item.name != only:
                continue
            flag = flag_of(item)
            if flag in merged:
                merged[flag].targets.append((group, item.name))
                continue
            meta = item.metadata
            negate = bool(meta.get("negate"))
            names = [flag] + ([meta["short"]] if meta.get("short") else [])
            default = False if negate else item.default
            parsed = bool if negate else _parsed_type(item, hints)
            metavar = meta.get("metavar") or _METAVARS.get(parsed)
            info = typer.Option(
                default,
                *names,
                help=meta.get("help"),
                metavar=metavar,
                show_default=meta.get("show_default", True) and default is not None,
            )
            if default is None:
                parsed = parsed | None
            parameter = inspect.Parameter(
                _param_name(flag), inspect.Parameter.KEYWORD_ONLY, default=info, annotation=parsed
            )
            merged[flag] = _Option(flag, parameter, [(group, item.name)], negate)
    flags = set(merged)
    for option in merged.values():
        group, name = option.targets[0]
        item = groups[group].__dataclass_fields__[name]  # type: ignore[attr-defined]
        spelled = [old for old in item.metadata.get("old", ()) if old not in flags]
        if spelled and not option.negate:
            flags.update(spelled)
            hint = option.parameter.annotation
            hidden = typer.Option(None, *spelled, hidden=True)
            option.old = inspect.Parameter(
                "old_" + option.parameter.name,
                inspect.Parameter.KEYWORD_ONLY,
                default=hidden,
                annotation=hint if "None" in str(hint) else hint | None,
            )
    return list(merged.values())


def command(name: str, **settings: Any) -> Callable[[Callable[..., Any]], Callable[..., Any]]:
    """Register ``fn`` as command ``name``, its options-class parameters spread into options."""

    def register(fn: Callable[..., Any]) -> Callable[..., Any]:
        signature = inspect.signature(fn)
        hints = typing.get_type_hints(fn)
        own: list[inspect.Parameter] = []
        groups: dict[str, type[StageOptions]] = {}
        for parameter in signature.parameters.values():
            hint = hints.get(parameter.name, parameter.annotation)
            if isinstance(hint, type) and issubclass(hint, StageOptions):
                groups[parameter.name] = hint
            else:
                own.append(parameter.replace(annotation=hint))
        options = _options_for(groups)
        taken = {parameter.name for parameter in own}
        clash = [option.flag for option in options if option.parameter.name in taken]
        if clash:
            raise TypeError(f"{name}: options {clash} clash with the command's own parameters")

        def wrapper(**values: Any) -> Any:
            fields: dict[str, dict[str, Any]] = {group: {} for group in groups}
            for option in options:
                value = values.pop(option.parameter.name)
                if option.old is not None:
                    former = values.pop(option.old.name)
                    value = value if former is None else former
                if option.negate:
                    value = not value
                if isinstance(value, tuple | list) and len(value) == 0:
                    value = None
                for group, field_name in option.targets:
                    fields[group][field_name] = value
            built = {group: cls(**fields[group]) for group, cls in groups.items()}
            return fn(**values, **built)

        # Keyword-only parameters may follow the command's own ones in any order.
        kinds = [p.replace(kind=inspect.Parameter.KEYWORD_ONLY) for p in own]
        wrapper.__signature__ = signature.replace(  # type: ignore[attr-defined]
            parameters=kinds
            + [option.parameter for option in options]
            + [option.old for option in options if option.old is not None]
        )
        wrapper.__name__ = fn.__name__
        wrapper.__doc__ = fn.__doc__
        wrapper.__module__ = fn.__module__
        app.command(name, **settings)(wrapper)
        return fn

    return register


def option_flags(*classes: type[StageOptions]) -> set[str]:
    """Every command-line name the given options classes offer."""
    return {flag_of(item) for cls in classes for item in dataclasses.fields(cls)}  # type: ignore[arg-type]


def field_option(cls: type[StageOptions], name: str) -> Any:
    """The typer option of one field, for a command that offers only some of a class's fields."""
    return _options_for({"one": cls}, only=name)[0].parameter.default
