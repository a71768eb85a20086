"""Made-up demo clips: moving shapes over the demo's generated scenes, encoded with PyAV.

`make_demo_clips(out_dir)` writes one shard, `clips-000000.tar`, beside the demo image shards (which
it leaves untouched): each sample is `{key}.mp4` (or `{key}.mkv`), `{key}.cls` and `{key}.txt`. A
clip is a still scene from `demo.scenes` with one to three shapes drifting across it (a boat, a
gull, a ball) and a slow change of light, so consecutive frames differ a little and distant ones a
lot. Needs the video extra (PyAV). Sizes, lengths and rates vary on purpose: portrait, landscape and
wide clips, 10 to 15 frames a second, 1.5 to 4 seconds.

Video is encoded with FFmpeg's own MPEG-4 Part 2 encoder (always in PyAV's builds, one thread), so
the same seed gives the same bytes.
"""

from __future__ import annotations

import io
import tarfile
from pathlib import Path

import numpy as np

from ..extras import require
from .data import DEMO_CLASSES, DEMO_KEY_PREFIX
from .scenes import draw_facade, draw_panorama, draw_shoreline

__all__ = ["CLIP_SHARD", "clip_shard_path", "encode_clip", "make_demo_clips", "render_clip"]

CLIP_SHARD = "clips-000000.tar"
_MTIME = 1_700_000_000
_SEED_SALT = 0x636C_6970  # separates clip draws from the image demo's
#: (scene renderer, class name) pairs the clips are drawn over.
_SCENES = ((draw_shoreline, "shoreline"), (draw_facade, "facade"), (draw_panorama, "panorama"))
#: (height, width) of the clips, cycled: landscape, portrait, wide, square-ish.
_SIZES = ((96, 160), (144, 96), (80, 224), (120, 128))
_SHAPES = ("boat", "gull", "ball")


def clip_shard_path(out_dir: str | Path) -> Path:
    """Where make_demo_clips writes its shard."""
    return Path(out_dir) / CLIP_SHARD


def _shape_mask(kind: str, h: int, w: int, cy: float, cx: float, r: float) -> np.ndarray:
    """bool [h, w]: one shape centred at (cy, cx) with size r, whole-array math only."""
    y, x = np.mgrid[0:h, 0:w].astype(np.float32)
    dy, dx = (y - cy) / r, (x - cx) / r
    if kind == "ball":
        return dx * dx + dy * dy <= 1.0
    if kind == "gull":  # two shallow wings
        return (np.abs(dy + 0.35 * np.abs(dx)) < 0.18) & (np.abs(dx) < 1.2)
    return ((dy > 0) & (dy < 0.6) & (np.abs(dx) < 1.4 - dy)) | ((np.abs(dx) < 0.08) & (dy > -1.0) & (dy <= 0))


def render_clip(rng: np.random.Generator, h: int, w: int, frames: int) -> tuple[np.ndarray, str, list[str]]:
    """[frames, h, w, 3] uint8: a scene with shapes moving across it; its class name and shape names."""
    draw, category = _SCENES[int(rng.integers(len(_SCENES)))]
    scene = draw(h, w, rng).astype(np.float32)
    kinds = [str(k) for k in rng.choice(_SHAPES, size=int(rng.integers(1, 4)))]
    start = rng.uniform([0.15 * h, -0.1 * w], [0.85 * h, 0.5 * w], size=(len(kinds), 2))
    speed = rng.uniform([-0.4, 0.8], [0.4, 3.0], size=(len(kinds), 2)) * (w / 160)
    size = rng.uniform(0.05, 0.12, size=len(kinds)) * min(h, w) * 1.5
    colours = rng.integers(0, 256, size=(len(kinds), 3)).astype(np.float32)
    light = 1.0 + 0.25 * np.sin(np.linspace(0, np.pi * rng.uniform(0.5, 1.5), frames))
    out = np.empty((frames, h, w, 3), np.uint8)
    for f in range(frames):
        img = scene * light[f]
        for k, kind in enumerate(kinds):
            cy, cx = start[k] + speed[k] * f
            img[_shape_mask(kind, h, w, cy, cx, size[k])] = colours[k]
        out[f] = np.clip(img, 0, 255).astype(np.uint8)
    return out, category, kinds


def encode_clip(frames: np.ndarray, fps: int, container: str = "mp4") -> bytes:
    """[F, H, W, 3] uint8 (H, W even) -> MPEG-4 video in an MP4 or Matroska container, deterministic."""
    av = require("av", "the demo clips")
    buf = io.BytesIO()
    # bitexact: no random segment id or encoder version in the file, so the same frames give the same bytes
    with av.open(buf, "w", format="matroska" if container == "mkv" else "mp4",
                 container_options={"fflags": "+bitexact"}) as out:
        stream = out.add_stream("mpeg4", rate=fps)
        stream.height, stream.width = frames.shape[1:3]
        stream.pix_fmt = "yuv420p"
        stream.gop_size = 12
        stream.thread_count = 1
        stream.options = {"qscale": "3"}
        for f in frames:
            for packet in stream.encode(av.VideoFrame.from_ndarray(f, format="rgb24")):
                out.mux(packet)
        for packet in stream.encode():
            out.mux(packet)
    return buf.getvalue()


def _add(tar: tarfile.TarFile, name: str, data: bytes) -> None:
    info = tarfile.TarInfo(name)
    info.size, info.mtime, info.mode = len(data), _MTIME, 0o644
    tar.addfile(info, io.BytesIO(data))


def make_demo_clips(out_dir: str | Path, *, clips: int = 12, seed: int = 0) -> Path:
    """Write out_dir/clips-000000.tar with `clips` made-up clips (every fourth in Matroska); return its path."""
    if clips < 1:
        raise ValueError(f"clips must be >= 1 (got {clips})")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    path = clip_shard_path(out)
    tmp = path.with_name(path.name + ".tmp")
    with tarfile.open(tmp, "w", format=tarfile.USTAR_FORMAT) as tar:
        for i in range(clips):
            rng = np.random.default_rng(np.random.SeedSequence([seed, _SEED_SALT, i]))
            h, w = _SIZES[i % len(_SIZES)]
            fps = int(rng.integers(10, 16))
            frames, category, kinds = render_clip(rng, h, w, int(fps * rng.uniform(1.5, 4.0)))
            key = f"{DEMO_KEY_PREFIX}-clip-{i:04d}"
            container = "mkv" if i % 4 == 3 else "mp4"
            shapes = ", ".join(kinds)
            caption = f"A {category} at Gullwick Point with {shapes} moving across it, {len(frames) / fps:.1f} s."
            _add(tar, f"{key}.{container}", encode_clip(frames, fps, container))
            _add(tar, f"{key}.cls", str(DEMO_CLASSES.index(category)).encode())
            _add(tar, f"{key}.txt", caption.encode("utf-8"))
    tmp.replace(path)
    return path
