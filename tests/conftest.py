"""Shared test fixtures: tiny tar shards built in a temporary folder (no network, no repo files)."""

from __future__ import annotations

import io
import tarfile
from pathlib import Path

import numpy as np
import pytest
from PIL import Image


def encode_png(arr: np.ndarray) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, format="PNG")
    return buf.getvalue()


def random_image(rng: np.random.Generator, h: int, w: int) -> np.ndarray:
    return rng.integers(0, 256, size=(h, w, 3), dtype=np.uint8)


def labels_texts(batches) -> dict[str, tuple[int, str]]:
    """key -> (label, text) of every image the batches hold; a key seen twice fails the test."""
    out = {}
    for b in batches:
        for r, keys in enumerate(b.keys):
            for j, key in enumerate(keys):
                assert key not in out, f"{key} emitted twice"
                out[key] = (int(b.labels[r, j]), b.texts[r][j])
    return out


def write_shard(path: Path, samples: list[tuple[str, dict[str, bytes]]]) -> Path:
    """Write webdataset-style members `{key}.{ext}` with Python's tarfile."""
    with tarfile.open(path, "w") as tar:
        for key, members in samples:
            for ext, data in members.items():
                info = tarfile.TarInfo(f"{key}.{ext}")
                info.size = len(data)
                info.mtime = 0
                tar.addfile(info, io.BytesIO(data))
    return path


def make_shards(folder: Path, n_shards: int, per_shard: int, *, seed: int = 0,
                sizes: tuple[int, int] = (8, 96)) -> list[str]:
    """n_shards shards of per_shard random PNGs of random sizes with integer labels."""
    rng = np.random.default_rng(seed)
    paths = []
    for s in range(n_shards):
        samples = []
        for i in range(per_shard):
            h, w = (int(v) for v in rng.integers(sizes[0], sizes[1], size=2))
            key = f"s{s:02d}-{i:04d}"
            samples.append((key, {"png": encode_png(random_image(rng, h, w)), "cls": str(i % 5).encode()}))
        paths.append(str(write_shard(folder / f"part-{s:03d}.tar", samples)))
    return paths


@pytest.fixture
def shards(tmp_path: Path) -> list[str]:
    return make_shards(tmp_path, 4, 12)


@pytest.fixture(scope="session")
def demo_dir(tmp_path_factory) -> Path:
    from patchloom.demo.data import make_demo_shards

    out = tmp_path_factory.mktemp("demo")
    make_demo_shards(out, shards=3, per_shard=24, seed=5, progress=False)
    return out
