"""Clips: a video member's frame index (from its packets), which frames to take, and decoding only those.

PyAV (the `video` extra) is imported on first use. Only MP4/MOV, Matroska/WebM and AVI files are
opened, with their demuxer named from the file's magic bytes (FFmpeg never guesses a format, so a
playlist cannot make it open other files or URLs). Container metadata is untrusted: the frame count,
duration and rate a header claims are never read. The frames are counted from the video packets
themselves (at most MAX_CLIP_FRAMES, one small number each), the frame size from the stream header is
checked against decode.pixel_limit before any frame is decoded, and every decoded frame must have that
size. Only the chosen frames are converted to RGB: decoding starts at the last keyframe before the
first of them (a seek) and stops after the last.

Frame choice (`choose_frames`) is plain numpy over the frames' timestamps, drawn from one generator.
"""

from __future__ import annotations

import io
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from ..extras import require

if TYPE_CHECKING:
    from ..recipe.schema import VideoConfig

#: Most video packets (frames) one clip may list: about an hour at 30 frames a second. A container
#: listing more is refused before anything is decoded (patchloom reads short clips).
MAX_CLIP_FRAMES = 100_000


@dataclass(frozen=True, slots=True, eq=False)
class ClipIndex:
    """What the packet scan found in one clip: each frame's timestamp in presentation order, which
    frames are keyframes, and the frame size the stream header gives (checked on every frame)."""

    pts: np.ndarray  # int64 [n], ascending, in the stream's time base
    seconds: np.ndarray  # float64 [n]: seconds from the first frame
    keyframe: np.ndarray  # bool [n]
    height: int
    width: int
    codec: str
    container: str
    timed: bool = True  # False: some packet had no timestamp; frames are then counted in decode order

    @property
    def frames(self) -> int:
        return int(self.pts.size)

    @property
    def fps(self) -> float:
        """Frames per second measured from the timestamps (0 for a one-frame clip)."""
        span = float(self.seconds[-1]) if self.frames > 1 and self.timed else 0.0
        return (self.frames - 1) / span if span > 0 else 0.0


def _av() -> Any:
    return require("av", "video clips (source.video_keys)")


#: Leading box names of an MP4 / QuickTime file (bytes 4..8).
_MOV_BOXES = (b"ftyp", b"moov", b"mdat", b"free", b"wide", b"skip", b"pnot")


def container_format(data: bytes) -> str:
    """The FFmpeg demuxer for a clip's bytes, from their magic: `mov` (MP4, MOV, M4V), `matroska` (MKV,
    WebM) or `avi`. Anything else is refused (ValueError) before FFmpeg sees it: letting it probe any
    format would admit playlists and concat lists that open other files or URLs."""
    if data[4:8] in _MOV_BOXES:
        return "mov"
    if data[:4] == b"\x1a\x45\xdf\xa3":
        return "matroska"
    if data[:4] == b"RIFF" and data[8:12] == b"AVI ":
        return "avi"
    raise ValueError(f"not a video container patchloom reads (MP4/MOV, Matroska/WebM or AVI; the file starts "
                     f"with {data[:12]!r})")


def _open(av: Any, data: bytes) -> Any:
    return av.open(io.BytesIO(data), mode="r", format=container_format(data))


def scan_clip(data: bytes, *, pixel_limit: int) -> ClipIndex:
    """Read the clip's video packets (no decoding) into a ClipIndex. Raises ValueError, the skip
    reason, for bytes that are no readable container, one without a video stream (audio only), a
    frame size over pixel_limit, no frames, or more than MAX_CLIP_FRAMES."""
    av = _av()
    try:
        with _open(av, data) as container:
            if not container.streams.video:
                kinds = sorted({s.type for s in container.streams}) or ["none"]
                raise ValueError(f"the clip has no video stream (streams: {', '.join(kinds)}); an audio-only or "
                                 "empty file is no clip")
            stream = container.streams.video[0]
            width, height = int(stream.codec_context.width or 0), int(stream.codec_context.height or 0)
            if width < 1 or height < 1:
                raise ValueError("the clip's video stream gives no frame size")
            if width * height > pixel_limit:
                raise ValueError(f"clip frames are {width}x{height} = {width * height} pixels, over "
                                 f"decode.pixel_limit={pixel_limit}; raise it in the recipe if such clips are expected")
            pts: list[int] = []
            key: list[bool] = []
            timed = True
            for packet in container.demux(stream):
                if packet.size == 0:  # the demuxer's end-of-stream marker
                    continue
                stamp = packet.pts if packet.pts is not None else packet.dts
                timed = timed and stamp is not None
                pts.append(int(stamp) if stamp is not None else len(pts))
                key.append(bool(packet.is_keyframe))
                if len(pts) > MAX_CLIP_FRAMES:
                    raise ValueError(f"the clip lists more than {MAX_CLIP_FRAMES} frames; patchloom reads short clips "
                                     "(cut long videos into clips first)")
            base = stream.time_base
            codec, fmt = stream.codec_context.name, container.format.name
    except av.error.FFmpegError as exc:
        raise ValueError(f"the clip cannot be read ({type(exc).__name__}: {exc}): not a video file, or cut off"
                         ) from None
    if not pts:
        raise ValueError("the clip has no video frames")
    order = np.argsort(np.asarray(pts, np.int64), kind="stable") if timed else np.arange(len(pts))
    stamps = np.asarray(pts, np.int64)[order]
    if timed and np.any(np.diff(stamps) <= 0):
        timed = False  # repeated timestamps: count frames in decode order instead
        stamps, order = np.arange(len(pts), dtype=np.int64), np.arange(len(pts))
    unit = float(base) if timed and base else 0.0
    # Without usable timestamps the frames keep their decode order and have no time (fps mode refuses them).
    seconds = (stamps - stamps[0]) * unit if unit > 0 else np.full(len(pts), np.nan)
    return ClipIndex(stamps, seconds.astype(np.float64), np.asarray(key, bool)[order], height, width, codec, fmt,
                     timed=timed and unit > 0)


def choose_frames(seconds: np.ndarray, video: VideoConfig, temporal_patch: int,
                  rng: np.random.Generator | None) -> np.ndarray:
    """int64 [F]: which frames (indices into the clip's presentation order) become tokens, in order.

    `frames: N` (default max_frames): random -> N consecutive frames from a drawn start; uniform ->
    the middle frame of each of N equal parts of the clip. `fps: F`: frames F per second (the frame
    on screen at each time), as many as the clip has at that rate but at most max_frames, rounded
    down to whole slices of temporal_patch; random draws the window's start time, uniform centres it.
    Raises ValueError, the skip reason, when the clip has too few frames."""
    n = int(seconds.size)
    t = temporal_patch
    if video.fps is None:
        want = video.most_frames
        if n < want:
            raise ValueError(f"too few frames: the clip has {n}, video.frames asks for {want}")
        if video.sampling == "uniform":
            return np.floor((np.arange(want) + 0.5) * n / want).astype(np.int64)
        start = int(rng.integers(0, n - want + 1)) if rng is not None else 0
        return start + np.arange(want, dtype=np.int64)
    if not np.isfinite(seconds).all():
        raise ValueError("the clip's frames carry no usable timestamps, so video.fps cannot place them; "
                         "use video.frames for such clips")
    span = float(seconds[-1])
    available = math.floor(span * video.fps + 1e-9) + 1
    take = min(video.max_frames, available)
    take -= take % t
    if take < 1:
        raise ValueError(f"too few frames: the clip lasts {span:.3f} s, which at video.fps {video.fps:g} gives "
                         f"{available} frame{'s' if available != 1 else ''}, fewer than one slice of "
                         f"sizing.temporal_patch={t}")
    window = (take - 1) / video.fps
    room = max(0.0, span - window)
    offset = room / 2 if video.sampling == "uniform" or rng is None else float(rng.uniform(0.0, room))
    times = offset + np.arange(take) / video.fps
    idx = np.searchsorted(seconds, times + 1e-9, side="right") - 1
    return np.clip(idx, 0, n - 1).astype(np.int64)


def clip_memory(frames: int, height: int, width: int) -> int:
    """Bytes of `frames` RGB frames of height x width."""
    return frames * height * width * 3


def decode_frames(data: bytes, index: ClipIndex, picks: np.ndarray,
                  on_frame: Callable[[np.ndarray], np.ndarray]) -> list[np.ndarray]:
    """The chosen frames, in the order of `picks` (repeats allowed), each passed through `on_frame`
    (e.g. a resize) as soon as it is decoded, so only the processed frames are held.

    Decoding starts at the last keyframe at or before the first pick and stops after the last pick;
    frames in between that are not picked are never converted to RGB. Raises ValueError when the
    clip ends early or a frame's size differs from the header's."""
    av = _av()
    wanted = np.unique(picks)
    if wanted.size == 0:
        return []
    if wanted[0] < 0 or wanted[-1] >= index.frames:
        raise ValueError(f"frame {int(wanted[-1])} picked, but the clip has {index.frames}")
    try:
        got = _decode(av, data, index, wanted, on_frame, seek=index.timed)
        if got is None:  # the seek landed past the first pick: decode from the start instead
            got = _decode(av, data, index, wanted, on_frame, seek=False)
    except av.error.FFmpegError as exc:
        raise ValueError(f"the clip cannot be decoded ({type(exc).__name__}: {exc}): damaged or cut off") from None
    missing = [int(i) for i in wanted if int(i) not in got]
    if missing:
        raise ValueError(f"the clip ended before frame {missing[0]} (its packets list {index.frames} frames): "
                         "cut off or damaged")
    return [got[int(i)] for i in picks]


def _decode(av: Any, data: bytes, index: ClipIndex, wanted: np.ndarray,
            on_frame: Callable[[np.ndarray], np.ndarray], *, seek: bool) -> dict[int, np.ndarray] | None:
    first = int(wanted[0])
    keys = np.flatnonzero(index.keyframe[: first + 1])
    start = int(keys[-1]) if keys.size else 0
    by_pts = {int(p): i for i, p in enumerate(index.pts)} if index.timed else {}
    todo = {int(i) for i in wanted}
    out: dict[int, np.ndarray] = {}
    with _open(av, data) as container:
        stream = container.streams.video[0]
        stream.codec_context.thread_count = 1  # loaders run one process per core already
        if seek and start > 0:
            container.seek(int(index.pts[start]), stream=stream, backward=True, any_frame=False)
        count = 0
        for frame in container.decode(stream):
            if index.timed:
                i = by_pts.get(frame.pts) if frame.pts is not None else None
                if i is None:
                    if out or not seek:
                        raise ValueError("a decoded frame's timestamp matches none of the clip's packets")
                    return None
                if seek and not out and count == 0 and i > first:
                    return None
            else:
                i = count
            count += 1
            if i not in todo:
                continue
            if (frame.height, frame.width) != (index.height, index.width):
                raise ValueError(f"frame {i} is {frame.width}x{frame.height}, but the clip's header says "
                                 f"{index.width}x{index.height}")
            out[i] = on_frame(frame.to_ndarray(format="rgb24"))
            todo.discard(i)
            if not todo:
                break
    return out
