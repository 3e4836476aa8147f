"""Reading the project's YAML files (templates, band sets, fill records) with one-line errors.

One reader for every YAML file a user gives (:func:`read_yaml_file`). Beyond plain YAML
syntax it refuses, each with the line and column:

* a key written twice in one mapping (YAML 1.2 requires unique keys; PyYAML would keep the
  last silently, e.g. a ratio of 4 replaced by 8 further down). Merge keys (``<<``) keep
  their documented override meaning;
* values that look like a date, date-time or number but cannot be one (``2026-13-45``,
  an offset of ``+25:00``, an integer of thousands of digits);
* nesting deeper than :data:`MAX_DEPTH` levels (no project file needs more than a few);
* text that is not UTF-8 (UTF-16 or UTF-32 files are named as such), files larger than
  :data:`MAX_BYTES`.
"""

from __future__ import annotations

import codecs
import os
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable

import yaml
from yaml.constructor import ConstructorError

from .errors import PhantometryError

if TYPE_CHECKING:  # pragma: no cover
    from pydantic import ValidationError

__all__ = ["MAX_BYTES", "MAX_DEPTH", "StrictLoader", "read_yaml_file", "parse_yaml_text", "validation_problems"]

#: Largest YAML file read (bytes); project files are a few kilobytes.
MAX_BYTES = 4 * 1024 * 1024
#: Deepest nesting of mappings and lists accepted.
MAX_DEPTH = 64

_MERGE_TAG = "tag:yaml.org,2002:merge"
_KINDS = {
    "tag:yaml.org,2002:timestamp": "date or date-time",
    "tag:yaml.org,2002:int": "integer",
    "tag:yaml.org,2002:float": "number",
}


class _Refused(ConstructorError):
    """A value or key the strict loader refuses (not a syntax error)."""


class StrictLoader(yaml.SafeLoader):
    """``yaml.SafeLoader`` that refuses duplicate keys, impossible values and deep nesting."""

    def __init__(self, stream: Any) -> None:
        super().__init__(stream)
        self._depth = 0

    def compose_node(self, parent: Any, index: Any) -> Any:  # noqa: D102 (PyYAML hook)
        self._depth += 1
        try:
            if self._depth > MAX_DEPTH:
                raise _Refused(None, None, f"nested more than {MAX_DEPTH} levels deep", self.peek_event().start_mark)
            return super().compose_node(parent, index)
        finally:
            self._depth -= 1

    def construct_mapping(self, node: Any, deep: bool = False) -> Any:  # noqa: D102 (PyYAML hook)
        if isinstance(node, yaml.MappingNode):
            first_line: dict[Any, int] = {}
            for key_node, _ in node.value:
                if key_node.tag == _MERGE_TAG:
                    continue
                key = self.construct_object(key_node, deep=True)
                try:
                    hash(key)
                except TypeError:
                    continue  # PyYAML refuses unhashable keys itself
                if key in first_line:
                    raise _Refused(
                        None,
                        None,
                        f"key {key!r} appears twice in one mapping (lines {first_line[key] + 1} and "
                        f"{key_node.start_mark.line + 1}); keep one",
                        key_node.start_mark,
                    )
                first_line[key] = key_node.start_mark.line
        return super().construct_mapping(node, deep=deep)

    def construct_object(self, node: Any, deep: bool = False) -> Any:  # noqa: D102 (PyYAML hook)
        try:
            return super().construct_object(node, deep=deep)
        except (ValueError, OverflowError) as exc:
            if not isinstance(node, yaml.ScalarNode):
                raise
            text = node.value if len(node.value) <= 40 else node.value[:37] + "..."
            kind = _KINDS.get(node.tag, "value")
            reason = ""
            if kind == "date or date-time":  # Python's reasons, without its type names
                reason = " (the UTC offset must be under 24 hours)" if "offset" in str(exc) else f" ({exc})"
            raise _Refused(None, None, f"{text!r} is not a valid {kind}{reason}", node.start_mark) from None


def _decode(raw: bytes, p: Path, error: type[PhantometryError], what: str) -> str:
    """UTF-8 text of a file (a UTF-8 byte-order mark is dropped), else a one-line error."""
    for bom, name in (
        (codecs.BOM_UTF32_LE, "UTF-32"),
        (codecs.BOM_UTF32_BE, "UTF-32"),
        (codecs.BOM_UTF16_LE, "UTF-16"),
        (codecs.BOM_UTF16_BE, "UTF-16"),
    ):
        if raw.startswith(bom):
            raise error(f"{p}: the {what} is {name} text; save it as UTF-8")
    if raw.startswith(codecs.BOM_UTF8):
        raw = raw[len(codecs.BOM_UTF8):]
    if b"\x00" in raw:
        raise error(f"{p}: the {what} holds NUL bytes, so it is not UTF-8 text (UTF-16 without a byte-order mark?); save it as UTF-8")
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        column = exc.start - (raw.rfind(b"\n", 0, exc.start) + 1) + 1
        raise error(
            f"{p}: the {what} is not UTF-8 text: byte 0x{raw[exc.start]:02X} at line {line}, column {column}; "
            "save it as UTF-8"
        ) from None


def parse_yaml_text(text: str, where: str, error: type[PhantometryError]) -> Any:
    """Parse YAML text with :class:`StrictLoader`; any problem raises ``error`` naming ``where``."""
    try:
        return yaml.load(text, Loader=StrictLoader)  # noqa: S506 (a SafeLoader subclass)
    except _Refused as exc:
        mark = exc.problem_mark
        raise error(f"{where}: line {mark.line + 1}, column {mark.column + 1}: {exc.problem}") from None
    except yaml.reader.ReaderError as exc:
        before = text[: exc.position]
        line = before.count("\n") + 1
        column = exc.position - (before.rfind("\n") + 1) + 1
        char = exc.character if isinstance(exc.character, int) else ord(str(exc.character)[:1] or "\0")
        raise error(
            f"{where}: not valid YAML at line {line}, column {column}: control character U+{char:04X} is not allowed; "
            "remove it"
        ) from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        at = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        raise error(f"{where}: not valid YAML{at}: {problem}; fix the syntax") from None
    except RecursionError:
        raise error(f"{where}: nested too deeply to read; no project file needs more than a few levels") from None


def read_yaml_file(path: str | os.PathLike, error: type[PhantometryError], what: str, missing_hint: str | None = None) -> Any:
    """Parse a YAML file, raising ``error`` with a message that names the file.

    Parameters
    ----------
    error : the exception class to raise (e.g. ``TemplateError``).
    what : what the file is, for messages ("template", "band set", "fill record").
    missing_hint : said after "no such {what}" when the file does not exist.

    Notes
    -----
    What is refused besides YAML syntax errors is listed in the module docstring.
    """
    p = Path(path)
    try:
        with open(p, "rb") as fh:
            raw = fh.read(MAX_BYTES + 1)
    except FileNotFoundError:
        hint = f"; {missing_hint}" if missing_hint else ""
        raise error(f"{p}: no such {what}{hint}") from None
    except OSError as exc:
        raise error(f"{p}: cannot read {what} ({exc.strerror or exc})") from None
    if len(raw) > MAX_BYTES:
        raise error(f"{p}: larger than {MAX_BYTES // (1024 * 1024)} MB; a {what} is a small text file, check the path")
    return parse_yaml_text(_decode(raw, p, error, what), str(p), error)


def validation_problems(
    err: "ValidationError",
    *,
    place: Callable[[tuple], str | None] | None = None,
    problem: Callable[[dict[str, Any]], str | None] | None = None,
) -> list[str]:
    """Pydantic's errors of a parsed file as ``key.path: problem`` texts, one per error.

    The one formatting of validation errors for templates, band sets and fill records.
    ``place(loc)`` names the key (default: the dotted path; None: the problem stands alone,
    e.g. a record-level check that names its own fields); ``problem(error)`` words the problem
    (default, or when it returns None: pydantic's message without "Value error, ", a literal's
    allowed values, "required key missing").
    """
    out = []
    for e in err.errors():
        loc = tuple(e["loc"])
        where = place(loc) if place is not None else (".".join(str(x) for x in loc) or "(top level)")
        text = problem(e) if problem is not None else None
        if text is None:
            if e["type"] == "literal_error" and "expected" in e.get("ctx", {}):
                text = f"must be one of {e['ctx']['expected']}"
            elif e["type"] == "missing":
                text = "required key missing"
            else:
                text = e["msg"].removeprefix("Value error, ")
        out.append(text if where is None else f"{where}: {text}")
    return out
