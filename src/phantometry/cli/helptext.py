"""Plain ``--help`` pages: placeholders in words (``DIR``, ``NAME``), never Python types.

typer shows each value's Python type (``<list[Path]>``, ``<str>``, ``<bool>``) beside an
option or argument that has no ``metavar``. :func:`plain_help` walks the click command tree
built from the typer app once, before it runs, and gives every parameter a placeholder: the
``metavar`` its declaration names, else a word for its click type (``PATH``, ``TEXT``,
``NUMBER``, ``N``). Arguments are shown as click shows them (``INPUT...`` in the usage line,
no type beside the name). Only the click parameter interface is used (``param_type_name``,
``metavar``, ``type.name``, ``get_help_record``, ``get_usage_pieces``; typer carries its own
copy of click), so the pass applies to every command, including ones added later.
"""

from __future__ import annotations

from typing import Any, get_args, get_origin

#: placeholder for a type's name (a Python annotation's, or a click ParamType's)
TYPE_WORDS = {"path": "PATH", "str": "TEXT", "text": "TEXT", "float": "NUMBER", "int": "N", "integer": "N",
              "bool": "YES|NO", "boolean": "YES|NO", "datetime": "TIME"}


def type_word(param: Any) -> str:
    """The placeholder of a parameter without its own ``metavar``: a word for its type.

    typer's parameters describe their type in ``type_descriptor`` (the annotation, choices);
    click's in ``type`` (a ``ParamType`` with a ``name``); either is read.
    """
    desc = getattr(param, "type_descriptor", None)
    if desc is not None:
        if getattr(desc, "is_choice", False) and getattr(desc, "choices", None):
            return "|".join(str(getattr(c, "value", c)) for c in desc.choices)
        if getattr(desc, "is_path", False):
            return "PATH"
        if getattr(desc, "is_datetime", False):
            return "TIME"
        annotation = desc.annotation
        args = get_args(annotation)
        if get_origin(annotation) in (list, tuple) and args:
            annotation = args[0]
        name = getattr(annotation, "__name__", str(annotation))
    else:
        ptype = getattr(param, "type", None)
        choices = getattr(ptype, "choices", None)
        if choices:
            return "|".join(str(getattr(c, "value", c)) for c in choices)
        name = str(getattr(ptype, "name", "") or "")
    return TYPE_WORDS.get(name.lower(), "VALUE")


def _argument_word(param: Any) -> str:
    word = param.metavar or (param.name or "value").upper()
    return word[:-3] if word.endswith("...") else word


def _plain_argument_class(base: type) -> type:
    """A subclass of a typer argument class shown the way click shows arguments."""

    class PlainArgument(base):  # type: ignore[misc, valid-type]
        def get_help_record(self, ctx: Any) -> Any:
            record = super().get_help_record(ctx)
            if record is None:
                return None
            return self.plain_name(), record[1]

        def get_usage_pieces(self, ctx: Any) -> list[str]:
            name = self.plain_name()
            return [name if self.required else f"[{name}]"]

        def plain_name(self) -> str:
            word = _argument_word(self)
            return f"{word}..." if self.nargs != 1 else word

    PlainArgument.__name__ = f"Plain{base.__name__}"
    return PlainArgument


_ARGUMENT_CLASSES: dict[type, type] = {}


def plain_help(command: Any) -> Any:
    """Give every parameter of ``command`` and its subcommands a placeholder in words (in place).

    Flags (``--report``) take no value and keep none; an option's own ``metavar`` is kept.
    Returns the command.
    """
    for param in command.params:
        if param.param_type_name == "option":
            if not getattr(param, "is_flag", False) and not getattr(param, "count", False) and param.metavar is None:
                param.metavar = type_word(param)
        elif param.param_type_name == "argument":
            param.metavar = _argument_word(param)
            base = type(param)
            if base not in _ARGUMENT_CLASSES.values():
                cls = _ARGUMENT_CLASSES.get(base)
                if cls is None:
                    cls = _ARGUMENT_CLASSES[base] = _plain_argument_class(base)
                param.__class__ = cls
    for sub in getattr(command, "commands", {}).values():
        plain_help(sub)
    return command


__all__ = ["plain_help", "type_word"]
