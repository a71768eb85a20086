"""The corpus a benchmark runs on: `photos` (web-sized JPEGs, made in `patchloom-bench/`),
`photos-small` (real photos at everyday sizes, a fifth PNG, made in `patchloom-bench-small/`),
`demo` (the demo archive, made in `patchloom-demo/`), or a recipe file over its own shards.

Each is made on first use and reused after; `--shards` points any of them at other shards.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import braceexpand

from ..demo.data import demo_shard_pattern, make_demo_shards
from ..demo.recipe import DEMO_RECIPE
from ..recipe import Recipe
from .photos import PHOTO_RECIPE, make_photo_shards, photo_shard_pattern
from .small_photos import make_small_photo_shards, small_photo_shard_pattern

__all__ = ["CORPORA", "Corpus", "ensure_demo_shards", "load_corpus"]

#: Built-in corpus name -> the folder its shards are made in by default.
CORPORA: dict[str, str] = {"photos": "patchloom-bench", "photos-small": "patchloom-bench-small",
                           "demo": "patchloom-demo"}

_DEMO_NAME = re.compile(r"demo-(\d{6})\.tar")


@dataclass(slots=True)
class Corpus:
    """A benchmark's recipe and shards, and whether demo shards had to be made for it."""

    name: str
    recipe: Recipe
    shards: str | list[str] | None  # None: the recipe's own source.shards
    made_in: Path | None = None  # the folder shards were just written to, if any


#: Generated photo corpora: name -> (make the shards in a folder, the folder's shard pattern).
_PHOTO_CORPORA = {
    "photos": (make_photo_shards, photo_shard_pattern),
    "photos-small": (make_small_photo_shards, small_photo_shard_pattern),
}

def load_corpus(corpus: str, *, shards: str | None = None, data: str | Path | None = None,
                make: bool = True, progress: bool = True) -> Corpus:
    """The recipe and shards of `corpus` (`photos`, `photos-small`, `demo` or a recipe YAML path).

    `shards` overrides the corpus's shards; `data` is where the built-in corpora are made (default:
    CORPORA). With `make`, absent corpus shards are written first, as are demo shards a recipe's
    shard spec names in `data` (default patchloom-demo).
    """
    folder = Path(data if data is not None else CORPORA.get(corpus, CORPORA["demo"]))
    made: Path | None = None
    if corpus in _PHOTO_CORPORA:
        maker, pattern = _PHOTO_CORPORA[corpus]
        recipe = Recipe.from_dict(PHOTO_RECIPE, origin=f"built-in benchmark corpus `{corpus}`")
        if shards is None:
            if make:
                maker(folder, progress=progress)
            shards = pattern(folder)
    elif corpus == "demo":
        recipe = Recipe.from_dict(DEMO_RECIPE, origin="built-in demo recipe")
        shards = shards if shards is not None else demo_shard_pattern(folder, shards=4)
    else:
        recipe = Recipe.from_file(corpus)
    spec = shards if shards is not None else recipe.source.shards
    if make and ensure_demo_shards(spec, demo_dir=folder, progress=progress):
        made = folder
    return Corpus(name=corpus, recipe=recipe, shards=shards, made_in=made)


def ensure_demo_shards(spec: str | list[str] | None, *, demo_dir: str | Path = "patchloom-demo",
                       progress: bool = True) -> bool:
    """Make the demo shards in `demo_dir` if `spec` names shards there and they are absent.

    Returns True when shards were written. A spec that points elsewhere is left alone.
    """
    if spec is None:
        return False
    folder = Path(demo_dir).resolve()
    wanted: list[int] = []
    for item in [spec] if isinstance(spec, str) else spec:
        for name in braceexpand.braceexpand(item.removeprefix("file:")):
            path = Path(name).expanduser()
            match = _DEMO_NAME.fullmatch(path.name)
            if match and path.resolve().parent == folder:
                wanted.append(int(match.group(1)))
    if not wanted or all((folder / f"demo-{i:06d}.tar").is_file() for i in wanted):
        return False
    make_demo_shards(folder, shards=max(wanted) + 1, progress=progress)
    return True
