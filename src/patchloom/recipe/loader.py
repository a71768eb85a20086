"""Recipe files: a hardened YAML loader, `extends` chains, and guards on size and characters.

A recipe is data. It is loaded with a restricted YAML safe loader (no Python or custom tags, no
duplicate keys, size and alias-expansion caps) and never names code to run.

A recipe file may start with ``extends: base.yaml`` (a path relative to the extending file; the
base may extend another file in turn, a cycle is an error). The base is loaded first and the
extending file's keys override it:

- mappings merge key by key, at every depth;
- any other value, lists included, replaces the base's value whole (lists are not appended to);
- ``key: null`` in an extending file removes the key, so it takes its schema default. (Where
  null is itself a setting, e.g. ``source.label_key: null`` for unlabelled data, write it in a
  file that extends nothing: there null keeps its plain meaning.)

Resolution happens before validation, so an extending recipe validates, prints (``to_yaml``) and
fingerprints exactly like the same settings written out in full.
"""

from __future__ import annotations

import os
import re
import stat
from pathlib import Path
from typing import Any

import yaml

from .messages import Provenance, RecipeError, kind, show

#: Largest seed: seeds feed numpy's SeedSequence (any size works there) and are written into
#: manifests and resume states, so they are kept to what a signed 64-bit integer holds. No
#: setting takes a larger integer, so `unusable_value` refuses any beyond it.
MAX_SEED = 2**63 - 1

#: File names `extends` may load.
RECIPE_SUFFIXES = (".yaml", ".yml")


# ---------------------------------------------------------------------------------------------
# YAML: the safe loader, narrowed to plain data and bounded in size.

MAX_RECIPE_BYTES = 1 << 20  # a recipe is a page of settings; anything near this is not one
MAX_RECIPE_NODES = 100_000  # values after expanding aliases (stops alias bombs before they expand)
MAX_RECIPE_DEPTH = 64  # nesting of mappings and lists
MAX_NUMBER_CHARS = 64  # an integer written longer than this is kept as LongNumber, never converted

_YAML_TAG_PREFIX = "tag:yaml.org,2002:"
_MERGE_TAG = _YAML_TAG_PREFIX + "merge"
_REFUSED_STD_TAGS = {_YAML_TAG_PREFIX + t for t in ("binary", "set", "omap", "pairs")}


class _Refused(yaml.YAMLError):
    """A YAML document that parses but is not acceptable as a recipe."""

    def __init__(self, message: str, mark: Any = None) -> None:
        super().__init__(message)
        self.message = message
        self.mark = mark

    def __str__(self) -> str:
        return f"{_line(self.mark)}{self.message}"


def _line(mark: Any) -> str:
    return f"line {mark.line + 1}: " if mark is not None else ""


def _short_tag(tag: str) -> str:
    return "!!" + tag[len(_YAML_TAG_PREFIX):] if tag.startswith(_YAML_TAG_PREFIX) else tag


class _RecipeLoader(yaml.SafeLoader):
    """The safe loader with limits: plain data only (mappings, lists, strings, numbers, booleans,
    null), bounded nesting; the composed tree is checked for size and duplicate keys before any
    value is built."""

    def __init__(self, stream: str) -> None:
        super().__init__(stream)
        self._depth = 0

    def compose_node(self, parent: Any, index: Any) -> Any:
        self._depth += 1
        try:
            if self._depth > MAX_RECIPE_DEPTH:
                raise _Refused(
                    f"nested more than {MAX_RECIPE_DEPTH} levels deep; a recipe is a few levels of settings",
                    self.peek_event().start_mark,
                )
            return super().compose_node(parent, index)
        finally:
            self._depth -= 1


def _refuse_tag(loader: _RecipeLoader, *args: Any) -> Any:
    node = args[-1]  # a multi-constructor also gets the tag's suffix first
    tag = _short_tag(node.tag)
    if node.tag.startswith(_YAML_TAG_PREFIX + "python/"):
        why = "a recipe is data, so it cannot create Python objects or run code"
    else:
        why = "a recipe holds only mappings, lists, strings, numbers, true/false and null"
    raise _Refused(f"tag {tag!r} is refused: {why}", node.start_mark)


class LongNumber:
    """Stands in for a YAML integer too long to convert (Python refuses over 4300 digits, and no
    setting needs more than 19), so validation can name its key instead of failing in the loader."""

    def __init__(self, text: str) -> None:
        self.length = len(text)

    def __repr__(self) -> str:
        return f"a number {self.length} characters long"


def _int_or_long(loader: _RecipeLoader, node: yaml.Node) -> int | LongNumber:
    text = loader.construct_scalar(node)
    if len(text) > MAX_NUMBER_CHARS:
        return LongNumber(text)
    return loader.construct_yaml_int(node)


def _timestamp_as_text(loader: _RecipeLoader, node: yaml.Node) -> str:
    # YAML 1.1 reads an unquoted 2024-01-01 as a date; a recipe has no dates, so keep the text.
    return loader.construct_scalar(node)


_RecipeLoader.add_constructor(None, _refuse_tag)
for _tag in _REFUSED_STD_TAGS:
    _RecipeLoader.add_constructor(_tag, _refuse_tag)
_RecipeLoader.add_constructor(_YAML_TAG_PREFIX + "timestamp", _timestamp_as_text)
_RecipeLoader.add_constructor(_YAML_TAG_PREFIX + "int", _int_or_long)
# YAML 1.1 reads `1e-6` (no dot, or an unsigned exponent) as text; read it as the number it is, as
# YAML 1.2 does, since numbers are strict (a float setting refuses text).
_RecipeLoader.add_implicit_resolver(
    _YAML_TAG_PREFIX + "float", re.compile(r"^[-+]?[0-9][0-9_]*(?:\.[0-9_]*)?[eE][-+]?[0-9]+$"), list("-+0123456789")
)
# Python tags are not registered by the safe loader; listing them anyway keeps the refusal explicit.
_RecipeLoader.add_multi_constructor(_YAML_TAG_PREFIX + "python/", _refuse_tag)


def _check_tree(loader: _RecipeLoader, root: yaml.Node) -> None:
    """Count values with aliases expanded (a shared node counts each time it is used), refuse a
    structure that contains itself, and refuse duplicate keys in a mapping."""
    sizes: dict[int, int] = {}
    open_nodes: set[int] = set()

    def size(node: yaml.Node) -> int:
        nid = id(node)
        if nid in sizes:
            return sizes[nid]
        if nid in open_nodes:
            raise _Refused("an alias refers to a node that contains it (a recursive structure)", node.start_mark)
        total = 1
        if isinstance(node, (yaml.SequenceNode, yaml.MappingNode)):
            open_nodes.add(nid)
            if isinstance(node, yaml.MappingNode):
                _check_duplicates(loader, node)
                children = [c for pair in node.value for c in pair]
            else:
                children = list(node.value)
            for child in children:
                total += size(child)
                if total > MAX_RECIPE_NODES:
                    raise _Refused(
                        f"more than {MAX_RECIPE_NODES} values once aliases are expanded; "
                        f"a recipe is far smaller, so this looks like aliases nested to multiply each other",
                        node.start_mark,
                    )
            open_nodes.discard(nid)
        sizes[nid] = total
        return total

    size(root)


def _check_duplicates(loader: _RecipeLoader, node: yaml.MappingNode) -> None:
    seen: dict[Any, int] = {}
    for key_node, _ in node.value:
        if not isinstance(key_node, yaml.ScalarNode) or key_node.tag == _MERGE_TAG:
            continue  # `<<` merge keys may be overridden by the mapping's own keys; complex keys fail later
        key = loader.construct_object(key_node)
        line = key_node.start_mark.line + 1
        try:
            first = seen.get(key)
        except TypeError:
            continue
        if first is not None:
            raise _Refused(
                f"key {show(key)} appears twice in one mapping (lines {first} and {line}); "
                f"YAML would silently keep the last one, so write it once",
                key_node.start_mark,
            )
        seen[key] = line


def load_yaml(path: Path) -> Any:
    """Read one recipe file into plain data; every failure is a RecipeError naming the file.

    At most MAX_RECIPE_BYTES + 1 bytes are read, so a device or a file that grows cannot fill memory;
    a pipe or socket is refused before it is opened, since reading one can wait forever."""
    try:
        mode = path.stat().st_mode
    except OSError as exc:
        raise RecipeError(f"cannot read recipe {path}: {exc.strerror or exc}") from None
    if stat.S_ISFIFO(mode) or stat.S_ISSOCK(mode) or stat.S_ISDIR(mode):
        kind = "a folder" if stat.S_ISDIR(mode) else "a pipe or socket, which could wait forever"
        raise RecipeError(f"cannot read recipe {path}: it is {kind}; give a recipe file")
    try:
        with path.open("rb") as f:
            raw = f.read(MAX_RECIPE_BYTES + 1)
            size = os.fstat(f.fileno()).st_size
    except OSError as exc:
        raise RecipeError(f"cannot read recipe {path}: {exc.strerror or exc}") from None
    if len(raw) > MAX_RECIPE_BYTES:
        shown = size if size > MAX_RECIPE_BYTES else f"more than {MAX_RECIPE_BYTES}"
        raise RecipeError(
            f"{path}: refused: {shown} bytes is over the {MAX_RECIPE_BYTES >> 20} MiB limit for a recipe file"
        )
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise RecipeError(f"{path}: not UTF-8 text (bad byte at offset {exc.start})") from None
    try:
        loader = _RecipeLoader(text)  # the reader refuses control characters here, before parsing
    except yaml.reader.ReaderError as exc:
        raise RecipeError(f"{path}: not valid YAML for a recipe: {_reader_problem(text, exc)}") from None
    try:
        node = loader.get_single_node()
        if node is None:
            return None
        _check_tree(loader, node)
        return loader.construct_document(node)
    except _Refused as exc:
        # "not valid YAML for a recipe": the text may be valid YAML, but not as a recipe.
        raise RecipeError(f"{path}: not valid YAML for a recipe: {exc}") from None
    except yaml.MarkedYAMLError as exc:
        raise RecipeError(f"{path}: not valid YAML: {_yaml_problem(exc)}") from None
    except yaml.YAMLError as exc:
        raise RecipeError(f"{path}: not valid YAML: {' '.join(str(exc).split())}") from None
    except RecursionError:
        raise RecipeError(f"{path}: not valid YAML for a recipe: nested too deeply") from None
    finally:
        loader.dispose()


def _reader_problem(text: str, exc: yaml.reader.ReaderError) -> str:
    """PyYAML's refusal of a character, as line, column and what to do."""
    pos = max(0, min(int(exc.position), len(text)))
    line = text.count("\n", 0, pos) + 1
    column = pos - (text.rfind("\n", 0, pos) + 1) + 1
    code = exc.character if isinstance(exc.character, int) else ord(str(exc.character)[:1] or "\0")
    return (f"line {line}, column {column}: control character U+{code:04X} is not allowed in a recipe; "
            f"remove it")


def _yaml_problem(exc: yaml.MarkedYAMLError) -> str:
    """PyYAML's several-line error, as one line: where, what, and what it was inside."""
    text = exc.problem or "unreadable"
    if exc.problem_mark is not None:
        text = f"line {exc.problem_mark.line + 1}, column {exc.problem_mark.column + 1}: {text}"
    if exc.context:
        where = ""
        if exc.context_mark is not None:
            where = f" at line {exc.context_mark.line + 1}, column {exc.context_mark.column + 1}"
        text += f" ({exc.context}{where})"
    return text


# ---------------------------------------------------------------------------------------------
# extends: resolve a chain of files into one mapping, remembering which file set each value.


def resolve_file(path: Path, chain: tuple[Path, ...] = ()) -> tuple[Any, Provenance]:
    """The file's data with its `extends` chain merged in, and the file that set each leaf value."""
    here = path.resolve()
    if here in (p.resolve() for p in chain):
        names = " -> ".join(str(p) for p in (*chain, path))
        raise RecipeError(f"{path}: extends cycle: {names}")
    data = load_yaml(path)
    if not isinstance(data, dict) or "extends" not in data:
        provenance: Provenance = {}
        if isinstance(data, dict):
            _record_leaves(data, (), str(path), provenance)
        elif data is not None:
            raise RecipeError(f"{path}: a recipe must be a mapping of sections, got {kind(data)}")
        return data, provenance
    data = dict(data)
    target = data.pop("extends")
    if not isinstance(target, str) or not target.strip():
        raise RecipeError(
            f"{path}: invalid recipe\n  extends: must be the path of a base recipe file, relative to this "
            f"file (got {show(target)})"
        )
    base_path = _base_file(path, target)
    base, provenance = resolve_file(base_path, (*chain, path))
    if base is None:
        base = {}
    return _merge(base, data, (), str(path), provenance), provenance


def _base_file(path: Path, target: str) -> Path:
    """The base file `extends: target` names, once it is known to be a recipe: a regular file (not a
    device, pipe or folder) named .yaml or .yml, also after following links, within the size cap."""
    def refuse(why: str) -> RecipeError:
        return RecipeError(f"{path}: invalid recipe\n  extends: {why} (got {show(target)})")

    bad = CONTROL.search(target)
    if bad:
        raise refuse(f"contains control character U+{ord(bad.group()):04X}; remove it")
    base_path = path.parent / target
    try:
        real = base_path.resolve()
    except (OSError, RuntimeError) as exc:  # a link loop
        raise refuse(f"cannot be followed to a file ({exc})") from None
    if base_path.suffix.lower() not in RECIPE_SUFFIXES or real.suffix.lower() not in RECIPE_SUFFIXES:
        named = "" if real.name == base_path.name else f", a link to {real}"
        raise refuse(f"must name a recipe file ending in .yaml or .yml{named}")
    try:
        info = base_path.stat()
    except OSError:
        info = None
    if info is None or not stat.S_ISREG(info.st_mode):
        reason = "no such file" if info is None else (
            "is a folder" if stat.S_ISDIR(info.st_mode) else "is not a regular file (a device, pipe or socket)")
        raise RecipeError(f"{path}: extends {target!r}: cannot read recipe {base_path}: {reason}")
    if info.st_size > MAX_RECIPE_BYTES:
        raise refuse(f"{base_path} is {info.st_size} bytes, over the {MAX_RECIPE_BYTES >> 20} MiB limit")
    return base_path


def _record_leaves(data: dict[str, Any], prefix: tuple[Any, ...], origin: str, provenance: Provenance) -> None:
    for key, value in data.items():
        if isinstance(value, dict) and value:
            _record_leaves(value, (*prefix, key), origin, provenance)
        else:
            provenance[(*prefix, key)] = origin


def _forget(provenance: Provenance, prefix: tuple[Any, ...]) -> None:
    for p in [p for p in provenance if p[: len(prefix)] == prefix]:
        del provenance[p]


def _merge(
    base: dict[str, Any], over: dict[str, Any], prefix: tuple[Any, ...], origin: str, provenance: Provenance
) -> dict[str, Any]:
    """`over` on top of `base`: mappings merge, anything else replaces, null removes the key."""
    out = dict(base)
    for key, value in over.items():
        where = (*prefix, key)
        below = out.get(key)
        if value is None:
            out.pop(key, None)
            _forget(provenance, where)
        elif isinstance(value, dict):
            if not isinstance(below, dict):
                _forget(provenance, where)
                below = {}
            out[key] = _merge(below, value, where, origin, provenance)
            if not value and not out[key]:
                provenance[where] = origin
        else:
            _forget(provenance, where)
            out[key] = value
            provenance[where] = origin
    return out


# ---------------------------------------------------------------------------------------------
# Values no setting can take, whatever the schema says.

# C0 and C1 control characters (Unicode category Cc), tab and newline included: no setting needs
# one, and printed in an error they could rewrite the terminal.
CONTROL = re.compile("[\x00-\x1f\x7f-\x9f]")


def unusable_value(data: Any) -> tuple[tuple[Any, ...], str] | None:
    """(key path, problem) for the first value no setting can take whatever the schema says: a
    string or key with a control character, or an integer too large for any setting. Checked
    before validation so that the problem is reported at its key, in one line."""
    stack: list[tuple[tuple[Any, ...], Any]] = [((), data)]
    seen: set[int] = set()
    while stack:
        path, value = stack.pop()
        if isinstance(value, str):
            bad = CONTROL.search(value)
            if bad:
                return path, (f"contains control character U+{ord(bad.group()):04X} at position {bad.start()}; "
                              f"remove it (got {show(value)})")
        elif isinstance(value, LongNumber) or (
            isinstance(value, int) and not isinstance(value, bool) and abs(value) > MAX_SEED
        ):
            return path, (f"{show(value)} is too large for any setting (seed takes 0..{MAX_SEED}; sizes and "
                          f"counts are far smaller)")
        elif isinstance(value, (dict, list, tuple)) and id(value) not in seen:
            seen.add(id(value))
            if isinstance(value, dict):
                items = list(value.items())
                for key, _ in items:
                    bad = CONTROL.search(key) if isinstance(key, str) else None
                    if bad:
                        return path, (f"key {show(key)} contains control character U+{ord(bad.group()):04X}; "
                                      f"remove it")
            else:
                items = list(enumerate(value))
            stack.extend(((*path, k), v) for k, v in reversed(items))
    return None

