"""Recipe error messages: each problem as one line naming its key path, what is allowed there and
what was given, with a did-you-mean for misspelt, misplaced and renamed keys.

Nothing here knows the recipe's sections: the functions walk the pydantic model they are given as
`root` (the Recipe), so the schema imports this module and never the reverse.
"""

from __future__ import annotations

import difflib
import math
import types
import typing
from dataclasses import dataclass
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ValidationError

from ..errors import PatchloomError


class RecipeError(PatchloomError, ValueError):
    """A recipe that cannot be used; the message names the file and the key path."""


class ProblemAt(ValueError):
    """A cross-field problem raised by a model validator, reported at the key `path` (from the
    top of the recipe) instead of at the section that found it."""

    def __init__(self, path: tuple[str, ...], message: str) -> None:
        super().__init__(message)
        self.path = path


# ---------------------------------------------------------------------------------------------
# Renamed keys: an old name is refused with one line naming the new one.


@dataclass(frozen=True, slots=True)
class Rename:
    """A key that moved: `old` and `new` are dotted key paths; `values` pairs an old value with
    its new spelling where the values were renamed too."""

    old: str
    new: str
    values: tuple[tuple[str, str], ...] = ()


#: Every renamed key, by its old path. The fingerprint reads settings under these old names, so a
#: rename alone does not change a recipe's fingerprint (see schema.fingerprint_form).
RENAMES: dict[str, Rename] = {r.old: r for r in (
    Rename("crop.scale", "crop.area"),
    Rename("crop.ratio", "crop.aspect_jitter"),
    Rename("drop.apply", "drop.output", (("drop", "remove"), ("mask", "mask"))),
    Rename("drop.block_min_area", "drop.block.min_area"),
    Rename("drop.block_aspect", "drop.block.aspect"),
    Rename("drop.stride", "drop.grid.stride"),
    Rename("drop.content_noise", "drop.content.noise"),
    Rename("packing.buffer", "packing.lookahead"),
)}


def renamed_message(old: str, got: Any) -> str | None:
    """'crop.scale was renamed: use crop.area; write crop: {area: [0.5, 1.0]}' for a renamed key
    given the value `got`; None when `old` was never renamed."""
    r = RENAMES.get(old)
    if r is None:
        return None
    text = f"{old} was renamed: use {r.new}"
    value = got
    if r.values:
        new_values = dict(r.values)
        if not isinstance(got, str) or got not in new_values:
            return f"{text}, one of {', '.join(show(v) for _, v in r.values)}"
        value = new_values[got]
        if value != got:
            text += f" ({show(got)} is now {show(value)})"
    *parents, key = r.new.split(".")
    snippet = f"{key}: {show(value)}"
    for part in reversed(parents):
        snippet = f"{part}: {{{snippet}}}"
    return f"{text}; write {snippet}"


def renamed_value(path: tuple[Any, ...], got: Any) -> str | None:
    """The new spelling of `got` at a key whose values were renamed (drop.output: drop -> remove)."""
    for r in RENAMES.values():
        if r.values and r.new == path_text(path) and isinstance(got, str):
            new = dict(r.values).get(got)
            return new if new != got else None
    return None


# ---------------------------------------------------------------------------------------------
# One line per problem, naming the key path and what is allowed there.

#: For each key path of a recipe read from files, the file that set it (see loader.resolve_file).
Provenance = dict[tuple[Any, ...], str]


def where(loc: tuple[Any, ...], provenance: Provenance | None, origin: str) -> str:
    """'' when the value at `loc` came from the file being loaded, else 'BASE-FILE: '."""
    if not provenance:
        return ""
    for n in range(len(loc), 0, -1):
        if loc[:n] in provenance:
            src = provenance[loc[:n]]
            break
    else:
        files = {f for p, f in provenance.items() if p[: len(loc)] == loc}
        src = files.pop() if len(files) == 1 else origin
    return "" if src == origin else f"{src}: "


def path_text(path: tuple[Any, ...]) -> str:
    return ".".join(str(p) for p in path)


def _plain(ann: Any) -> Any:
    """int for `Annotated[int, Strict()]` (StrictInt); the annotation itself otherwise."""
    return typing.get_args(ann)[0] if typing.get_origin(ann) is Annotated else ann


def _strip_none(ann: Any) -> Any:
    """X for `X | None`; the annotation itself otherwise (strictness markers removed)."""
    if _is_union(ann):
        args = [a for a in typing.get_args(ann) if a is not type(None)]
        if len(args) == 1:
            return _plain(args[0])
    return _plain(ann)


def _is_union(ann: Any) -> bool:
    return typing.get_origin(ann) in (typing.Union, types.UnionType)


def _model_of(ann: Any) -> type[BaseModel] | None:
    ann = _strip_none(ann)
    return ann if isinstance(ann, type) and issubclass(ann, BaseModel) else None


def _follow(root: type[BaseModel], loc: tuple[Any, ...]) -> tuple[tuple[Any, ...], Any, bool]:
    """Walk an error location through the schema, from the model `root`.

    Returns the location to report, the annotation there (None where the schema says nothing:
    an unknown key, or free-form data) and whether the location ends at a union whose member
    names pydantic had put into the location (those are reported once, at the union)."""
    ann: Any = root
    path: list[Any] = []
    for n, part in enumerate(loc):
        if ann is None:
            return (*path, *loc[n:]), None, False
        model = _model_of(ann)
        inner = _strip_none(ann)
        if model is not None:
            if isinstance(part, str) and part in model.model_fields:
                ann = model.model_fields[part].annotation
                path.append(part)
                continue
            return (*path, *loc[n:]), None, False
        if _is_union(inner):
            return tuple(path), ann, True
        origin = typing.get_origin(inner)
        args = typing.get_args(inner)
        if isinstance(part, int) and origin is list:
            ann = args[0]
        elif isinstance(part, int) and origin is tuple:
            ann = args[0] if len(args) == 2 and args[1] is Ellipsis else (args[part] if part < len(args) else None)
        else:
            ann = None
        path.append(part)
    return tuple(path), ann, False


def _lookup(data: Any, loc: tuple[Any, ...]) -> Any:
    for part in loc:
        try:
            data = data[part]
        except (KeyError, IndexError, TypeError):
            return _NOTHING
    return data


_NOTHING = object()

_WORDS: dict[Any, tuple[str, str]] = {
    str: ("a string", "strings"),
    int: ("an integer", "integers"),
    float: ("a number", "numbers"),
    bool: ("true or false", "true/false values"),
    type(None): ("null", "nulls"),
}


def _describe(ann: Any, plural: bool = False) -> str:
    """What a value of this annotation looks like, in words."""
    ann = _plain(ann)
    if ann in _WORDS:
        return _WORDS[ann][plural]
    origin = typing.get_origin(ann)
    args = typing.get_args(ann)
    if origin is Literal:
        choices = ", ".join(show(a) for a in args)
        return f"one of {choices}" if len(args) > 1 else show(args[0])
    if _is_union(ann):
        parts = [_describe(a, plural) for a in args]
        return ", ".join(parts[:-1]) + " or " + parts[-1]
    if origin is list:
        return "lists" if plural else f"a list of {_describe(args[0], plural=True)}"
    if origin is tuple:
        if len(set(args)) == 1:
            text = f"{len(args)} {_describe(args[0], plural=True)}"
            return f"lists of {text}" if plural else f"a list of {text}"
        inner = ", ".join(_describe(a).removeprefix("a ").removeprefix("an ") for a in args)
        return f"[{inner}] pairs" if plural and len(args) == 2 else f"[{inner}]"
    model = _model_of(ann)
    if model is not None:
        return "mappings" if plural else f"a mapping with keys {', '.join(model.model_fields)}"
    if origin is dict:
        return "mappings" if plural else "a mapping"
    return "values" if plural else "a value"


def show(value: Any, limit: int = 60) -> str:
    """A value as a reader of the YAML file would write it, shortened."""
    if value is True or value is False:
        text = "true" if value else "false"
    elif isinstance(value, int) and value.bit_length() > 128:  # repr() refuses over 4300 digits
        text = f"a number of about {int(value.bit_length() * math.log10(2)) + 1} digits"
    elif value is None:
        text = "null"
    elif isinstance(value, (list, tuple)):
        text = "[" + ", ".join(show(v, limit) for v in value) + "]"
    elif isinstance(value, dict):
        text = "{" + ", ".join(f"{show(k, limit)}: {show(v, limit)}" for k, v in value.items()) + "}"
    else:
        text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def kind(value: Any) -> str:
    return {list: "a list", str: "a string", int: "a number", float: "a number", bool: "true/false"}.get(
        type(value), type(value).__name__
    )


def _section_fields(model: type[BaseModel], prefix: str = "") -> dict[str, list[str]]:
    """Every key name of `model` and of its sections at any depth, to the paths that have it."""
    found: dict[str, list[str]] = {}
    for name, field in model.model_fields.items():
        found.setdefault(name, []).append(prefix + name)
        sub = _model_of(field.annotation)
        if sub is not None:
            for key, paths in _section_fields(sub, f"{prefix}{name}.").items():
                found.setdefault(key, []).extend(paths)
    return found


def _unknown_key(root: type[BaseModel], path: tuple[Any, ...], in_file: bool) -> str:
    model = _model_of(_follow(root, path[:-1])[1])
    allowed = list(model.model_fields) if model is not None else []
    if not path[:-1] and in_file:
        allowed.append("extends")
    key = path[-1]
    msg = "unknown key"
    if isinstance(key, str):  # (a key that is not a string is reported as invalid_key instead)
        lowered = {a.lower(): a for a in allowed}
        close = difflib.get_close_matches(key.lower(), list(lowered), n=1, cutoff=0.6)
        here = ".".join(str(p) for p in path[:-1])
        elsewhere = [p for p in _section_fields(root).get(key, []) if p.rpartition(".")[0] != here]
        below = [p for p in elsewhere if here and p.startswith(here + ".")]  # in a sub-section of this one
        if below:
            msg += f"; did you mean {' or '.join(repr(p) for p in below)}?"
        elif close:
            msg += f"; did you mean {lowered[close[0]]!r}?"
        elif elsewhere:
            msg += f"; did you mean {' or '.join(repr(p) for p in elsewhere)}?"
    return f"{msg} (allowed: {', '.join(allowed)})" if allowed else msg


_QUOTE_HINT = "quote it: YAML reads unquoted yes/no/on/off/true/false as booleans and digits as numbers"
_RANGE = {"greater_than_equal": (">=", "ge"), "greater_than": (">", "gt"),
          "less_than_equal": ("<=", "le"), "less_than": ("<", "lt")}
_TYPE_ERRORS = {
    "int_parsing", "int_type", "float_parsing", "float_type", "bool_parsing", "bool_type", "string_type",
    "list_type", "tuple_type", "dict_type", "model_type", "model_attributes_type", "too_short", "too_long",
    "string_too_short", "string_too_long", "int_parsing_size", "none_required",
}


def _problem(root: type[BaseModel], err: Any, data: Any, in_file: bool) -> tuple[tuple[Any, ...], str, bool]:
    """(location, message, whether the line names the location first) for one pydantic error."""
    path, msg = _located(root, err, data, in_file)
    if err["type"] == "extra_forbidden":
        renamed = renamed_message(path_text(path), err.get("input"))
        if renamed is not None:
            return path, renamed, False  # the message starts with the old key's path itself
    return path, msg, True


def _located(root: type[BaseModel], err: Any, data: Any, in_file: bool) -> tuple[tuple[Any, ...], str]:
    """(location, message) for one pydantic error."""
    kind = err["type"]
    path, ann, at_union = _follow(root, tuple(err["loc"]))
    got = err.get("input")
    cause = (err.get("ctx") or {}).get("error")
    if isinstance(cause, ProblemAt):
        return cause.path, " ".join(str(cause).split())
    if at_union or (kind == "missing" and path and isinstance(path[-1], int)):
        if kind == "missing":
            path = path[:-1]
            ann = _follow(root, path)[1]
        got = _lookup(data, path)
        shown = "" if got is _NOTHING else f" (got {show(got)})"
        return path, f"must be {_describe(ann)}{shown}"
    if kind == "extra_forbidden":
        return path, _unknown_key(root, path, in_file)
    if kind == "invalid_key":  # pydantic puts the key into the location; True shows as 1 there
        model = _model_of(_follow(root, path[:-1])[1])
        allowed = f" (allowed: {', '.join(model.model_fields)})" if model is not None else ""
        return path[:-1], f"key {show(got)} is not a string; {_QUOTE_HINT}{allowed}"
    if kind == "missing":
        what = f": {_describe(ann)}" if ann is not None else ""
        return path, f"required key is missing{what}"
    if kind == "literal_error":
        choices = list(typing.get_args(_strip_none(ann))) if ann is not None else []
        allowed = ", ".join(show(c) for c in choices) or err["ctx"]["expected"]
        hint = ""
        if isinstance(got, str):
            close = difflib.get_close_matches(got, [str(c) for c in choices], n=1)
            new = renamed_value(path, got)
            hint = f"; did you mean {(new or close[0])!r}?" if new or close else ""
        return path, f"must be one of {allowed} (got {show(got)}{hint})"
    if kind in _RANGE:
        op, name = _RANGE[kind]
        return path, f"must be {op} {err['ctx'][name]} (got {show(got)})"
    if kind == "int_from_float":
        return path, f"must be a whole number (got {show(got)})"
    if kind == "finite_number":
        return path, f"must be a finite number, not NaN or infinity (got {show(got)})"
    if kind == "int_type" and isinstance(got, float) and not isinstance(got, bool):
        if got.is_integer():
            return path, f"must be an integer, written without a decimal point or exponent (got {show(got)})"
        return path, f"must be a whole number (got {show(got)})"
    if kind in _TYPE_ERRORS:
        what = _describe(ann) if ann is not None else err["msg"].replace("Input should be ", "")
        if kind in ("int_type", "float_type") and isinstance(got, bool):
            what += ", not true/false"
        msg = f"must be {what} (got {show(got)})"
        if kind == "string_type" and isinstance(got, (bool, int, float)):
            msg += f"; {_QUOTE_HINT}"
        elif kind in ("int_type", "float_type") and isinstance(got, str) and _number_text(got):
            msg += "; write the number without quotes"
        return path, msg
    msg = " ".join(err["msg"].split()).removeprefix("Value error, ").removeprefix("Assertion failed, ")
    msg = msg.replace("Input should be", "must be")
    if kind == "value_error":  # our validators say what they got; a section's input is the whole section
        if "(got " not in msg and not isinstance(got, (dict, list, tuple)):
            msg += f" (got {show(got)})"
    elif not isinstance(got, dict):
        msg += f" (got {show(got)})"
    return path, msg


def _number_text(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def explain(
    exc: ValidationError,
    origin: str,
    root: type[BaseModel],
    *,
    data: Any = None,
    provenance: Provenance | None = None,
    in_file: bool = False,
) -> str:
    """The RecipeError message for a failed validation of `root`: a header naming `origin`, then
    one line per problem, each led by the base file that set the value when it is not `origin`."""
    lines = [f"{origin}: invalid recipe"]
    for err in exc.errors():
        path, msg, named = _problem(root, err, data, in_file)
        loc = path_text(path) if named else ""
        line = f"  {where(path, provenance, origin)}{loc + ': ' if loc else ''}{msg}"
        if line not in lines:
            lines.append(line)
    return "\n".join(lines)
