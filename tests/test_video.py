"""Video clips: frames chosen and decoded from PyAV-made clips, cut into tubelets, packed beside images.

Every clip here is made in the test with PyAV: frame i is flat grey at brightness STEP * i (lossless
H.264, or MPEG-4 in AVI), so a token's values say which frame it came from.
"""

from __future__ import annotations

import io
import json
import struct
import tracemalloc
from pathlib import Path

import numpy as np
import pytest
from conftest import encode_png, write_shard

av = pytest.importorskip("av", reason="the video extra (PyAV) runs these tests: pip install 'patchloom[video]'")

from patchloom import Pipeline, Recipe, pack  # noqa: E402
from patchloom.extras import MissingExtraError, require  # noqa: E402
from patchloom.image.chain import SampleError, process_record, process_sample  # noqa: E402
from patchloom.image.dropping import DROP_MODES, apply_drop, decide_drop  # noqa: E402
from patchloom.image.patches import PatchSet, grid_coords, slice_times  # noqa: E402
from patchloom.image.video import MAX_CLIP_FRAMES, choose_frames, scan_clip  # noqa: E402
from patchloom.read import Record  # noqa: E402
from patchloom.recipe import RecipeError  # noqa: E402
from patchloom.recipe.schema import fingerprint_form  # noqa: E402
from patchloom.testing import check_resume  # noqa: E402

STEP = 10  # brightness added per frame
P = 8  # patch size of the recipes here


def encode_clip(frames: np.ndarray, *, fps: int = 10, fmt: str = "mp4", codec: str = "libx264", gop: int = 12) -> bytes:
    """[F, H, W, 3] uint8 -> a video file's bytes (lossless H.264 in MP4 by default), a keyframe every `gop`."""
    buf = io.BytesIO()
    with av.open(buf, "w", format=fmt) as out:
        stream = out.add_stream(codec, rate=fps)
        stream.height, stream.width = frames.shape[1:3]
        stream.pix_fmt = "yuv420p"
        stream.gop_size = gop
        if codec == "libx264":
            stream.options = {"crf": "0", "preset": "ultrafast"}
        if codec == "libvpx-vp9":
            stream.options = {"lossless": "1", "deadline": "realtime", "cpu-used": "8"}
        for f in frames:
            for packet in stream.encode(av.VideoFrame.from_ndarray(f, format="rgb24")):
                out.mux(packet)
        for packet in stream.encode():
            out.mux(packet)
    return buf.getvalue()


def ramp(n: int, h: int = 32, w: int = 48) -> np.ndarray:
    """n flat frames, frame i at brightness STEP * i."""
    return np.broadcast_to((np.arange(n, dtype=np.uint8) * STEP)[:, None, None, None], (n, h, w, 3)).copy()


def clip_bytes(n: int, h: int = 32, w: int = 48, fps: int = 10, **kw) -> bytes:
    return encode_clip(ramp(n, h, w), fps=fps, **kw)


def recipe(tmp_path: Path | None = None, **sections) -> Recipe:
    base = {
        "seed": 3,
        "source": {"video_keys": ["mp4", "avi"], "label_key": None, "on_error": "raise", "shuffle_shards": False},
        "sizing": {"patch_size": P, "max_tokens": 96, "temporal_patch": 2},
        "video": {"frames": 8},
        "packing": {"seq_len": 128, "rows": 2, "max_images_per_row": 4, "lookahead": 4},
    }
    for name, values in sections.items():
        base[name] = {**base.get(name, {}), **values} if isinstance(values, dict) else values
    return Recipe.from_dict(base)


def _still(value: int) -> dict[str, bytes]:
    """An image sample: a flat 16x24 PNG."""
    return {"png": encode_png(np.full((16, 24, 3), value, np.uint8))}


def record(key: str, members: dict[str, bytes]) -> Record:
    return Record(key, "mem://test.tar", 0, members)


def frame_of(values: np.ndarray) -> np.ndarray:
    """Frame index each value block shows: brightness / STEP (lossless H.264 keeps flat greys within 1)."""
    return np.rint(values.astype(np.float64) / STEP).astype(int)


def token_frames(ps: PatchSet, t: int) -> np.ndarray:
    """[N, t]: the frame each of a token's t frames shows (each frame block is flat)."""
    blocks = ps.patches.reshape(ps.num_tokens, t, -1).astype(np.float64)
    assert np.all(blocks.max(axis=2) - blocks.min(axis=2) <= 2), "a frame block of a flat clip is not flat"
    return frame_of(blocks.mean(axis=2))


# ---------------------------------------------------------------------------------------------
# tokens, times, frames


def test_tubelet_tokens_come_from_the_right_frames_in_order():
    r = recipe(video={"frames": 8, "sampling": "uniform"})
    ps = process_record(record("c", {"mp4": clip_bytes(20)}), r, 0)
    # uniform over 20 frames: the middle frame of each of 8 equal parts
    want = np.floor((np.arange(8) + 0.5) * 20 / 8).astype(int)
    assert want.tolist() == [1, 3, 6, 8, 11, 13, 16, 18]
    got = token_frames(ps, 2)
    assert ps.frames == 4
    for s in range(4):
        sel = ps.times == s
        assert sel.sum() == ps.grid[0] * ps.grid[1]
        assert (got[sel] == want[2 * s: 2 * s + 2]).all(), f"slice {s}"
    assert np.all(np.diff(ps.times) >= 0), "slices come in order"
    assert ps.meta["clip"]["frames"] == want.tolist()


@pytest.mark.parametrize("fmt,codec,ext", [("webm", "libvpx-vp9", "webm"), ("matroska", "libx264", "mkv"),
                                           ("avi", "mpeg4", "avi")])
def test_other_containers_give_the_same_frames(fmt, codec, ext):
    if codec not in av.codecs_available:
        pytest.skip(f"this PyAV build has no {codec} encoder")
    r = recipe(source={"video_keys": [ext]}, video={"frames": 8, "sampling": "uniform"})
    ps = process_record(record("c", {ext: clip_bytes(20, fmt=fmt, codec=codec)}), r, 0)
    blocks = ps.patches.reshape(ps.num_tokens, 2, -1).astype(float).mean(axis=2)
    want = np.array([1, 3, 6, 8, 11, 13, 16, 18]) * STEP
    for s in range(4):
        expected = np.broadcast_to(want[2 * s: 2 * s + 2], (ps.grid[0] * ps.grid[1], 2))
        np.testing.assert_allclose(blocks[ps.times == s], expected, atol=4 if codec == "mpeg4" else 1.5)


def test_random_start_takes_consecutive_frames():
    r = recipe(video={"frames": 6})
    starts = set()
    for key in "abcdefgh":
        ps = process_record(record(key, {"mp4": clip_bytes(16)}), r, 0)
        got = token_frames(ps, 2)
        first = got[ps.times == 0][0, 0]
        want = first + np.arange(6)
        for s in range(3):
            assert (got[ps.times == s] == want[2 * s: 2 * s + 2]).all()
        assert 0 <= first <= 10
        starts.add(int(first))
    assert len(starts) > 2, "the start is drawn per sample"


def test_times_and_frames_agree_with_segment_ids(tmp_path):
    shard = write_shard(tmp_path / "mix.tar", [
        ("c0", {"mp4": clip_bytes(12)}),
        ("i0", {"png": encode_png(np.full((24, 40, 3), 77, np.uint8))}),
        ("c1", {"mp4": clip_bytes(10, 24, 48)}),
        ("i1", {"png": encode_png(np.full((40, 16, 3), 140, np.uint8))}),
    ])
    r = recipe(sizing={"max_tokens": 64}, packing={"seq_len": 160, "rows": 2}, source={"shards": str(shard)})
    seen = {}
    for b in Pipeline(r):
        assert b.times.shape == b.segment_ids.shape and b.times.dtype == np.int32
        assert b.frames.shape == b.grids.shape[:2] and b.frames.dtype == np.int32
        assert (b.times[b.segment_ids == 0] == 0).all()
        assert ((b.frames > 0) == (b.grids[..., 0] > 0)).all()
        lengths = b.segment_lengths()
        for row in range(b.rows):
            for j, key in enumerate(b.keys[row]):
                sel = b.segment_ids[row] == j + 1
                times, f = b.times[row][sel], int(b.frames[row, j])
                gh, gw = b.grids[row, j]
                assert lengths[row, j] == f * gh * gw  # a clip is one segment of slices x grid tokens
                assert np.bincount(times, minlength=f).tolist() == [gh * gw] * f
                seen[key] = f
    assert seen == {"c0": 4, "i0": 1, "c1": 4, "i1": 1}


def test_patch_dim_is_t_p_p_3_and_stills_repeat_their_frame():
    r = recipe(sizing={"temporal_patch": 4}, video={"frames": 8})
    image = np.random.default_rng(0).integers(0, 256, (32, 48, 3), np.uint8)
    still = process_record(record("i", {"png": encode_png(image)}), r, 0)
    clip = process_record(record("c", {"mp4": clip_bytes(8)}), r, 0)
    d = 4 * P * P * 3
    assert still.patches.shape[1] == clip.patches.shape[1] == d
    blocks = still.patches.reshape(still.num_tokens, 4, P * P * 3)
    assert (blocks == blocks[:, :1]).all(), "a still repeats its frame in every frame of the tubelet"
    assert still.frames == 1 and (still.times == 0).all()
    batch = pack([still, clip], 256)
    assert batch.patches.shape[-1] == d
    assert batch.frames[0].tolist()[:2] == [1, 2]


def test_images_only_recipe_has_no_times():
    r = Recipe.from_dict({"source": {"label_key": None}, "sizing": {"patch_size": P, "max_tokens": 32}})
    ps = process_record(record("i", {"png": encode_png(np.zeros((16, 16, 3), np.uint8))}), r, 0)
    assert ps.times is None
    b = pack([ps], 64)
    assert b.times is None and b.frames is None and "times" not in b.to_arrays()


# ---------------------------------------------------------------------------------------------
# budget and aspect


@pytest.mark.parametrize("h,w,frames,budget", [(32, 48, 8, 96), (24, 96, 8, 96), (64, 32, 4, 120), (40, 40, 12, 96)])
def test_clip_budget_and_aspect(h, w, frames, budget):
    r = recipe(sizing={"max_tokens": 128}, video={"frames": frames, "max_tokens": budget, "sampling": "uniform"})
    ps = process_record(record("c", {"mp4": clip_bytes(frames + 2, h, w)}), r, 0)
    gh, gw = ps.grid
    slices = frames // 2
    assert ps.frames == slices and ps.num_tokens == slices * gh * gw
    per_slice = budget // slices
    assert gh * gw <= per_slice, "each slice stays within the clip budget shared evenly"
    assert gh * gw >= 0.85 * per_slice, "budget mode fills the slice budget"
    assert abs(np.log((gh / gw) / (h / w))) < 0.35, "the grid keeps the clip's aspect"


def test_video_max_tokens_defaults_to_sizing_max_tokens():
    r = recipe(sizing={"max_tokens": 48}, video={"frames": 4, "sampling": "uniform"})
    ps = process_record(record("c", {"mp4": clip_bytes(6)}), r, 0)
    assert ps.num_tokens <= 48 and ps.frames == 2


# ---------------------------------------------------------------------------------------------
# frame choice


def test_fps_sampling_takes_frames_at_the_rate():
    # 30 frames at 10 fps (2.9 s from first to last frame); at 5 fps: every second frame
    r = recipe(video={"frames": None, "fps": 5.0, "max_frames": 8, "sampling": "uniform"})
    ps = process_record(record("c", {"mp4": clip_bytes(30, fps=10)}), r, 0)
    got = token_frames(ps, 2)
    order = np.concatenate([got[ps.times == s][0] for s in range(ps.frames)])
    assert len(order) == 8 and (np.diff(order) == 2).all()
    # uniform centres the window: 15 frames fit at 5 fps, 8 taken, 7 left over -> starts near the middle
    assert order[0] in (7, 8)


def test_fps_sampling_on_a_short_clip_takes_what_it_has():
    r = recipe(video={"frames": None, "fps": 5.0, "max_frames": 16, "sampling": "uniform"})
    ps = process_record(record("c", {"mp4": clip_bytes(10, fps=10)}), r, 0)  # 0.9 s: 5 frames at 5 fps
    got = token_frames(ps, 2)
    order = np.concatenate([got[ps.times == s][0] for s in range(ps.frames)])
    # 5 fit, rounded down to whole slices of 2: a 0.6 s window in 0.9 s, centred (starts 0.15 s in)
    assert order.tolist() == [1, 3, 5, 7]


def test_choose_frames_is_pure_numpy():
    seconds = np.arange(40) / 20.0  # 40 frames at 20 fps
    v = recipe(video={"frames": None, "fps": 4.0, "max_frames": 6}).video
    a = choose_frames(seconds, v, 2, np.random.default_rng(1))
    b = choose_frames(seconds, v, 2, np.random.default_rng(1))
    assert (a == b).all() and len(a) == 6 and (np.diff(a) == 5).all()
    with pytest.raises(ValueError, match="too few frames"):
        choose_frames(np.arange(3) / 10.0, recipe(video={"frames": 8}).video, 2, None)


def test_eval_sampling_is_deterministic():
    r = recipe(video={"frames": 4, "sampling": "uniform"})
    data = clip_bytes(20)
    runs = [process_record(record("c", {"mp4": data}), r.replace(seed=s), e).patches for s in (0, 9) for e in (0, 3)]
    for other in runs[1:]:
        np.testing.assert_array_equal(runs[0], other)


def test_training_sampling_is_seeded_per_sample_and_epoch():
    r = recipe(video={"frames": 4})
    data = clip_bytes(30)

    def start(rec, epoch, key="c"):
        ps = process_record(record(key, {"mp4": data}), rec, epoch)
        return int(token_frames(ps, 2)[0, 0])

    assert start(r, 0) == start(r, 0)
    assert len({start(r, e) for e in range(8)}) > 2, "the start changes with the epoch"
    assert len({start(r.replace(seed=s), 0) for s in range(8)}) > 2, "and with the seed"
    assert len({start(r, 0, k) for k in "abcdefgh"}) > 2, "and with the sample"


def test_training_sampling_resumes(tmp_path):
    shard = write_shard(tmp_path / "clips.tar", [
        (f"k{i:02d}", {"mp4": clip_bytes(10 + i % 4)} if i % 3 else _still(i))
        for i in range(12)
    ])
    r = recipe(source={"shards": str(shard), "shuffle_buffer": 4}, drop={"mode": "tube", "rate": 0.25},
               packing={"seq_len": 128, "rows": 2, "lookahead": 3})
    report = check_resume(lambda: Pipeline(r), every=1)
    assert report.batches >= 3


def test_rank_split_moves_whole_clips(tmp_path):
    shards = [str(write_shard(tmp_path / f"p{s}.tar", [(f"s{s}-{i}", {"mp4": clip_bytes(8)}) for i in range(3)]))
              for s in range(2)]
    r = recipe(source={"shards": shards}, video={"frames": 4})
    keys = [[k for b in Pipeline(r, rank=rank, world_size=2) for row in b.keys for k in row] for rank in (0, 1)]
    assert sorted(keys[0] + keys[1]) == sorted(f"s{s}-{i}" for s in range(2) for i in range(3))
    assert not set(keys[0]) & set(keys[1])


# ---------------------------------------------------------------------------------------------
# broken clips and guards


def _avi(n: int = 12, **kw) -> bytes:
    return clip_bytes(n, 24, 32, fmt="avi", codec="mpeg4", **kw)


def _audio_only() -> bytes:
    buf = io.BytesIO()
    with av.open(buf, "w", format="mp4") as out:
        stream = out.add_stream("aac", rate=8000)
        for _ in range(4):
            frame = av.AudioFrame.from_ndarray(np.zeros((1, 1024), np.float32), format="fltp", layout="mono")
            frame.sample_rate = 8000
            for packet in stream.encode(frame):
                out.mux(packet)
        for packet in stream.encode():
            out.mux(packet)
    return buf.getvalue()


def _zero_frames() -> bytes:
    """An AVI with a video stream that has no frame (only audio packets are written)."""
    buf = io.BytesIO()
    with av.open(buf, "w", format="avi") as out:
        video = out.add_stream("mpeg4", rate=10)
        video.width, video.height, video.pix_fmt = 32, 24, "yuv420p"
        audio = out.add_stream("mp2", rate=44100)
        for _ in range(3):
            frame = av.AudioFrame.from_ndarray(np.zeros((1, 1152), np.int16), format="s16", layout="mono")
            frame.sample_rate = 44100
            for packet in audio.encode(frame):
                out.mux(packet)
        for packet in audio.encode():
            out.mux(packet)
    return buf.getvalue()


def _lying_count(n: int = 12) -> bytes:
    """An AVI whose headers claim a million frames (avih dwTotalFrames, strh dwLength); it holds n."""
    data = bytearray(_avi(n))
    i = data.index(b"avih")
    data[i + 8 + 16: i + 8 + 20] = struct.pack("<I", 1_000_000)
    j = data.index(b"strh")
    data[j + 8 + 32: j + 8 + 36] = struct.pack("<I", 1_000_000)
    return bytes(data)


BROKEN = {
    "truncated-mp4": (lambda: clip_bytes(12)[: len(clip_bytes(12)) // 2], "cannot be read"),
    "truncated-avi": (lambda: _avi(12)[: len(_avi(12)) * 2 // 3], "too few frames|cannot be|ended before"),
    "audio-only": (_audio_only, "no video stream"),
    "zero-frames": (_zero_frames, "no video frames"),
    "garbage": (lambda: b"\x00\x01 not a video " * 20, "not a video container"),
    "playlist": (lambda: b"#EXTM3U\n#EXT-X-TARGETDURATION:1\n#EXTINF:1,\nfile:///etc/hostname\n#EXT-X-ENDLIST\n",
                 "not a video container"),
    "truncated-mkv": (lambda: clip_bytes(24, fmt="matroska")[: len(clip_bytes(24, fmt="matroska")) * 3 // 10],
                      "too few frames: the clip has [0-7],"),  # a cut Matroska file reads as a shorter clip
    "too-short": (lambda: clip_bytes(5), "too few frames: the clip has 5, video.frames asks for 8"),
}


@pytest.mark.parametrize("name", list(BROKEN))
def test_broken_clip_raises_with_its_reason(name):
    make, reason = BROKEN[name]
    with pytest.raises(SampleError, match=reason) as info:
        process_sample(record("bad", {"mp4": make()}), recipe(), 0)
    assert "key 'bad'" in str(info.value) and info.value.stage in ("video", "frames", "decode")


def test_broken_clips_are_skipped_and_counted(tmp_path):
    samples = [(f"bad-{name}", {"mp4": make()}) for name, (make, _) in BROKEN.items()]
    samples += [(f"ok-{i}", {"mp4": clip_bytes(10)}) for i in range(3)]
    shard = write_shard(tmp_path / "broken.tar", samples)
    r = recipe(source={"shards": str(shard), "on_error": "skip", "max_skip_ratio": 1.0})
    pipe = Pipeline(r)
    keys = [k for b in pipe for row in b.keys for k in row]
    assert sorted(keys) == ["ok-0", "ok-1", "ok-2"]
    led = pipe.ledger
    assert led.read == len(samples) and led.skipped_count == len(BROKEN)
    reasons = " | ".join(s.reason for s in led.skipped)
    for name, (_, reason) in BROKEN.items():
        assert any(s.key == f"bad-{name}" for s in led.skipped), name
    assert "no video stream" in reasons and "no video frames" in reasons


def test_lying_frame_count_allocates_nothing_for_it():
    data = _lying_count(12)
    with av.open(io.BytesIO(data)) as c:
        assert c.streams.video[0].frames == 1_000_000  # the header does claim a million frames
    r = recipe(video={"frames": 8, "sampling": "uniform"})
    tracemalloc.start()
    try:
        index = scan_clip(data, pixel_limit=10_000)
        ps = process_record(record("liar", {"avi": data}), r, 0)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert index.frames == 12, "frames are counted from the packets, not from the header"
    assert ps.frames == 4
    assert peak < 8 << 20, f"{peak} bytes traced for a 12-frame clip"
    assert MAX_CLIP_FRAMES < 1_000_000


class _Spy:
    """Wraps a PyAV input container: records seeks, frames decoded and frames converted to RGB."""

    log: dict[str, int] = {}

    def __init__(self, container):
        self.c = container

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.c.close()

    def __getattr__(self, name):
        return getattr(self.c, name)

    def seek(self, *a, **kw):
        _Spy.log["seeks"] += 1
        return self.c.seek(*a, **kw)

    def decode(self, stream):
        for frame in self.c.decode(stream):
            _Spy.log["decoded"] += 1
            yield _Frame(frame)


class _Frame:
    def __init__(self, frame):
        self.f = frame

    def __getattr__(self, name):
        return getattr(self.f, name)

    def to_ndarray(self, **kw):
        _Spy.log["converted"] += 1
        return self.f.to_ndarray(**kw)


def test_only_the_chosen_frames_are_decoded(monkeypatch):
    import patchloom.image.video as video

    monkeypatch.setattr(video, "_open", lambda av_, data: _Spy(av_.open(io.BytesIO(data))))
    data = clip_bytes(48, gop=8)
    r = recipe(video={"frames": 4})
    for key in (f"k{i}" for i in range(40)):  # a sample whose drawn start is past the third keyframe
        _Spy.log = {"seeks": 0, "decoded": 0, "converted": 0}
        ps = process_record(record(key, {"mp4": data}), r, 0)
        start = ps.meta["clip"]["frames"][0]
        if start >= 20:
            break
    else:
        pytest.fail("no sample drew a start past frame 20")
    assert _Spy.log["seeks"] == 1
    assert _Spy.log["converted"] == 4, "only the chosen frames become RGB"
    assert _Spy.log["decoded"] <= start - (start // 8) * 8 + 4, "decoding starts at the keyframe before the start"
    shown = ps.patches[ps.times == 0][0].reshape(2, -1).astype(float).mean(axis=1)
    np.testing.assert_allclose(shown, (np.array([start, start + 1]) * STEP) % 256, atol=1.5)  # ramp() wraps at 256


def test_frame_size_over_pixel_limit_is_refused_before_decoding():
    r = recipe(decode={"pixel_limit": 32 * 48 - 1})
    with pytest.raises(SampleError, match="over decode.pixel_limit"):
        process_record(record("big", {"mp4": clip_bytes(10)}), r, 0)


def test_frames_held_are_bounded_by_memory_limit():
    r = recipe(decode={"memory_limit": 32 * 48 * 3 + 8 * 100})  # one full frame, but not the 8 resized
    with pytest.raises(SampleError, match="decode.memory_limit") as info:
        process_record(record("c", {"mp4": clip_bytes(10)}), r, 0)
    assert info.value.stage == "sizing"


def test_missing_pyav_names_the_extra(monkeypatch):
    monkeypatch.setitem(__import__("sys").modules, "av", None)
    with pytest.raises(MissingExtraError, match=r"patchloom\[video\]"):
        require("av", "video clips")


# ---------------------------------------------------------------------------------------------
# dropping, augmentation


def _clip_set(slices: int = 3, grid=(4, 5)) -> PatchSet:
    gh, gw = grid
    n = gh * gw
    rng = np.random.default_rng(0)
    return PatchSet(rng.integers(0, 256, (slices * n, 2 * P * P * 3), dtype=np.uint8),
                    np.tile(grid_coords(gh, gw), (slices, 1)), grid, "c", times=slice_times(slices, n), frames=slices)


@pytest.mark.parametrize("mode", [m for m in DROP_MODES if m != "none"])
def test_every_drop_mode_works_on_clips(mode):
    ps = _clip_set()
    cfg = recipe(drop={"mode": mode, "rate": 0.5, "min_keep": 6}).drop
    d = decide_drop(cfg, ps.grid, ps.patches, np.random.default_rng(4), coords=ps.coords, times=ps.times, slices=3)
    assert d.keep.shape == (60,) and d.slices == 3
    out = apply_drop(ps, d, "remove")
    assert out.num_tokens == d.kept >= 6
    assert np.bincount(out.times, minlength=3).min() >= 2, "every slice keeps ceil(min_keep / slices)"
    # every kept token is the same token as before (values, place and slice travel together)
    flat = ps.times.astype(int) * 20 + ps.coords[:, 0] * 5 + ps.coords[:, 1]
    kept_flat = out.times.astype(int) * 20 + out.coords[:, 0] * 5 + out.coords[:, 1]
    np.testing.assert_array_equal(out.patches, ps.patches[np.isin(flat, kept_flat)])
    masked = apply_drop(ps, d, "mask")
    assert masked.num_tokens == 60 and (~masked.masked).sum() == d.kept


def test_tube_drops_the_same_positions_in_every_slice():
    ps = _clip_set(slices=4)
    cfg = recipe(drop={"mode": "tube", "rate": 0.4}).drop
    d = decide_drop(cfg, ps.grid, None, np.random.default_rng(2), times=ps.times, slices=4)
    per_slice = d.keep.reshape(4, 20)
    assert (per_slice == per_slice[0]).all() and per_slice[0].sum() == 12
    other = decide_drop(recipe(drop={"mode": "random", "rate": 0.4}).drop, ps.grid, None,
                        np.random.default_rng(2), times=ps.times, slices=4).keep.reshape(4, 20)
    assert not (other == other[0]).all(), "random decides each slice on its own"


def test_tube_drop_through_the_pipeline_with_windows():
    r = recipe(sizing={"grid_multiple": 2, "max_tokens": 96}, output={"token_order": "windows"},
               drop={"mode": "tube", "rate": 0.5}, video={"sampling": "uniform"})
    ps = process_record(record("c", {"mp4": clip_bytes(10)}), r, 0)
    places = [set(map(tuple, ps.coords[ps.times == s].tolist())) for s in range(ps.frames)]
    assert all(p == places[0] for p in places) and 0 < len(places[0]) < ps.grid[0] * ps.grid[1]
    rows, cols = np.array(sorted(places[0])).T
    assert len(places[0]) % 4 == 0, "whole 2x2 windows are dropped"


def test_augmentation_is_one_draw_for_every_frame():
    pytest.importorskip("albumentations")
    frames = ramp(8, 32, 48) + 40
    frames[:, :, :24] //= 4  # left half darker in every frame
    r = recipe(augment=[{"name": "HorizontalFlip", "p": 0.5}], video={"frames": 8, "sampling": "uniform"})
    flipped = set()
    for key in "abcdefghij":
        ps = process_record(record(key, {"mp4": encode_clip(frames)}), r, 0)
        gh, gw = ps.grid
        blocks = ps.patches.reshape(ps.num_tokens, 2, -1).astype(float).mean(axis=2)
        left = ps.coords[:, 1] < gw // 2
        for s in range(ps.frames):
            for k in range(2):
                sel = ps.times == s
                dark_left = blocks[sel & left, k].mean() < blocks[sel & ~left, k].mean()
                flipped.add((key, not dark_left))
        assert len({f for k, f in flipped if k == key}) == 1, f"{key}: frames flipped differently"
    assert {f for _, f in flipped} == {True, False}, "the draw happened (both outcomes seen)"


# ---------------------------------------------------------------------------------------------
# recipe keys


def test_recipe_keys_are_checked():
    with pytest.raises(RecipeError, match="not both"):
        recipe(video={"frames": 8, "fps": 4.0})
    with pytest.raises(RecipeError, match="multiple of sizing.temporal_patch"):
        recipe(video={"frames": 7})
    with pytest.raises(RecipeError, match="under the 32 a slice needs"):
        recipe(sizing={"min_tokens": 32}, video={"frames": 16})
    with pytest.raises(RecipeError, match="video.max_tokens must be <= packing.seq_len"):
        recipe(video={"max_tokens": 4096})
    with pytest.raises(RecipeError, match="video.sampling"):
        recipe(video={"sampling": "middle"})
    with pytest.raises(RecipeError, match="video_keys"):
        recipe(source={"video_keys": ["mp4", "mp4"]})


def test_new_keys_keep_old_fingerprints():
    plain = Recipe.from_dict({"seed": 1})
    form = fingerprint_form(plain.to_dict())
    assert "video" not in form and "video_keys" not in form["source"] and "temporal_patch" not in form["sizing"]
    assert recipe().fingerprint() != recipe(video={"frames": 4}).fingerprint()


# ---------------------------------------------------------------------------------------------
# store, report, bench


def test_pack_read_packed_and_verify_keep_times_and_frames(tmp_path):
    from patchloom.store import pack_to_dir, read_packed, verify_dir

    shard = write_shard(tmp_path / "mix.tar", [
        ("c0", {"mp4": clip_bytes(10)}), ("i0", {"png": encode_png(np.full((16, 24, 3), 9, np.uint8))}),
        ("c1", {"mp4": clip_bytes(12, 24, 32)}),
    ])
    r = recipe(source={"shards": str(shard)})
    out = tmp_path / "packed"
    pack_to_dir(r, out, workers=1, progress=False)
    man = json.loads((out / "manifest.json").read_text())
    assert man["batch_shape"]["clips"] is True
    import tarfile

    members = tarfile.open(out / man["shards"][0]["name"]).getnames()
    assert any(m.endswith(".times.npy") for m in members) and any(m.endswith(".frames.npy") for m in members)
    direct = list(Pipeline(r))
    back = list(read_packed(out))
    assert len(back) == len(direct)
    for a, b in zip(direct, back):
        np.testing.assert_array_equal(a.times, b.times)
        np.testing.assert_array_equal(a.frames, b.frames)
        np.testing.assert_array_equal(a.patches, b.patches)
    assert verify_dir(out, progress=False).ok


def test_report_shows_the_chosen_frames_and_the_token_time_map(tmp_path):
    pytest.importorskip("matplotlib")
    from patchloom.report import build_report

    shard = write_shard(tmp_path / "mix.tar", [
        ("c0", {"mp4": clip_bytes(12)}), ("i0", {"png": encode_png(np.full((16, 24, 3), 9, np.uint8))}),
        ("c1", {"mp4": clip_bytes(10, 24, 48)}),
    ])
    r = recipe(source={"shards": str(shard)}, drop={"mode": "tube", "rate": 0.5, "output": "mask"})
    summary = build_report(r, tmp_path / "report", samples=3, progress=False)
    html = (tmp_path / "report" / "index.html").read_text(encoding="utf-8")
    strips = sorted(p.name for p in (tmp_path / "report").glob("*-frames.png"))
    maps = sorted(p.name for p in (tmp_path / "report").glob("*-times.png"))
    assert len(strips) == len(maps) == 2, "one frame strip and one token-time map per traced clip"
    assert "token-time map" in html and "chosen frames" in html and "4 slices" in html
    from PIL import Image

    strip = np.asarray(Image.open(tmp_path / "report" / strips[0]))
    assert strip.shape[1] > 4 * strip.shape[0], "eight frames side by side"
    assert summary["summary"]["emitted"] == 3


def _mixed_shards(tmp_path: Path) -> list[str]:
    return [str(write_shard(tmp_path / f"m{s}.tar", [
        (f"m{s}-{i}", {"mp4": clip_bytes(8 + i)} if i % 2 == 0 else _still(i))
        for i in range(4)])) for s in range(2)]


def test_torch_loader_hands_over_times_and_frames(tmp_path):
    torch = pytest.importorskip("torch")
    from torch.utils.data import DataLoader

    from patchloom.adapters.torch import PatchloomDataset

    r = recipe(source={"shards": _mixed_shards(tmp_path)})
    direct = {k: (b.times[i], b.frames[i]) for b in Pipeline(r) for i, row in enumerate(b.keys) for k in row[:1]}
    got = {}
    for batch in DataLoader(PatchloomDataset(r), batch_size=None, num_workers=1):
        assert batch["times"].dtype == torch.int32 and batch["frames"].dtype == torch.int32
        for i, row in enumerate(batch["keys"]):
            if row:
                got[row[0]] = (batch["times"][i].numpy(), batch["frames"][i].numpy())
    assert got.keys() == direct.keys()
    for k in got:
        np.testing.assert_array_equal(got[k][0], direct[k][0])
        np.testing.assert_array_equal(got[k][1], direct[k][1])


def test_ray_engine_packs_clips_as_the_local_engine_does(tmp_path):
    ray = pytest.importorskip("ray")
    import logging

    from patchloom.store import pack_to_dir

    shards = _mixed_shards(tmp_path)
    r = recipe(source={"shards": shards})
    pack_to_dir(r, tmp_path / "local", workers=2, progress=False)
    started = not ray.is_initialized()
    if started:
        ray.init(num_cpus=2, include_dashboard=False, object_store_memory=150 << 20, logging_level=logging.WARNING)
    try:
        pack_to_dir(r, tmp_path / "ray", workers=2, progress=False, engine="ray")
    finally:
        if started:
            ray.shutdown()
    names = sorted(p.name for p in (tmp_path / "local").iterdir())
    assert names == sorted(p.name for p in (tmp_path / "ray").iterdir()) and len(names) > 1
    for name in names:
        assert (tmp_path / "local" / name).read_bytes() == (tmp_path / "ray" / name).read_bytes(), name


def test_demo_clips_are_deterministic_and_the_clip_recipe_reads_them_beside_images(tmp_path, demo_dir):
    from patchloom.demo.clips import make_demo_clips
    from patchloom.demo.data import demo_shard_pattern

    a = make_demo_clips(tmp_path / "a", clips=6)
    b = make_demo_clips(tmp_path / "b", clips=6)
    assert a.read_bytes() == b.read_bytes(), "the same seed gives the same bytes"
    r = Recipe.from_file(Path(__file__).resolve().parents[1] / "recipes" / "clips-and-images.yaml")
    pipe = Pipeline(r, shards=[demo_shard_pattern(demo_dir), str(a)])
    clips = images = 0
    for batch in pipe:
        assert batch.patches.shape[-1] == 2 * 16 * 16 * 3
        clips += int((batch.frames > 1).sum())
        images += int((batch.frames == 1).sum())
    assert clips == 6 and images == pipe.ledger.emitted - 6 > 0
    assert pipe.ledger.skipped_count == 1  # the demo's one deliberately truncated JPEG


def test_bench_clips_counts_clips_and_images(tmp_path):
    from patchloom.bench.clips import bench_clips, clip_recipe, format_clips_bench

    clips = write_shard(tmp_path / "clips.tar", [(f"c{i}", {"mp4": clip_bytes(12)}) for i in range(3)])
    images = write_shard(tmp_path / "images.tar", [(f"i{i}", _still(i)) for i in range(5)])
    plain = Recipe.from_dict({"source": {"label_key": None}, "sizing": {"patch_size": P, "max_tokens": 64},
                              "packing": {"seq_len": 128, "rows": 2}})
    assert clip_recipe(plain).source.video_keys and clip_recipe(recipe()) == recipe()
    result = bench_clips(plain, shards=str(images), clips=clips, repeats=1, max_images=4)
    # 12 frames at 10 fps last 1.1 s: at the bench's 4 fps that is 5 frames, 4 in whole slices of 2
    assert (result["clips"], result["images"], result["frames_per_clip"]) == (3, 4, 4)
    assert result["clips_per_s"] > 0 and result["images_per_s"] > 0
    assert "clips" in format_clips_bench(result) and "images" in format_clips_bench(result)


def test_an_image_folder_holds_clips_beside_images(tmp_path):
    """source.video_keys make files of a folder samples too: a clip file is one clip sample (with its
    sidecar caption), a still beside it an image sample, and the folder alone (no image file at all)
    is still found as a source."""
    folder = tmp_path / "media"
    (folder / "walks").mkdir(parents=True)
    (folder / "walks" / "c0.mp4").write_bytes(clip_bytes(12))
    (folder / "walks" / "c0.txt").write_text("a slow pan over a grey wall")
    (folder / "walks" / "c1.mp4").write_bytes(clip_bytes(10, 24, 48))
    (folder / "still.png").write_bytes(encode_png(np.full((24, 40, 3), 77, np.uint8)))
    r = recipe(sizing={"max_tokens": 64}, packing={"seq_len": 160, "rows": 2},
               source={"shards": str(folder), "text_key": "txt"})
    seen = {}
    for b in Pipeline(r):
        for row in range(b.rows):
            for j, key in enumerate(b.keys[row]):
                seen[key] = (int(b.frames[row, j]), b.texts[row][j])
    assert seen == {"walks/c0": (4, "a slow pan over a grey wall"), "walks/c1": (4, ""), "still": (1, "")}
    clips_only = tmp_path / "clips"
    clips_only.mkdir()
    (clips_only / "c0.mp4").write_bytes(clip_bytes(8))
    r = recipe(source={"shards": str(clips_only)}, packing={"seq_len": 160, "rows": 1})
    assert [k for b in Pipeline(r) for row in b.keys for k in row] == ["c0"]


def test_a_clip_recipe_without_pyav_fails_at_once_naming_the_extra(tmp_path, monkeypatch):
    """Not one skip per clip (which the skip guard might even let pass): the Pipeline refuses to start,
    and a clip reached some other way (process_record) raises the same error, not a SampleError."""
    shard = write_shard(tmp_path / "c.tar", [("c0", {"mp4": clip_bytes(8)}), ("i0", _still(90))])
    monkeypatch.setitem(__import__("sys").modules, "av", None)
    with pytest.raises(MissingExtraError, match=r"patchloom\[video\]"):
        Pipeline(recipe(source={"shards": str(shard), "on_error": "skip", "max_skip_ratio": None}))
    with pytest.raises(MissingExtraError, match=r"patchloom\[video\]"):
        process_record(record("c", {"mp4": clip_bytes(8)}), recipe(source={"on_error": "skip"}), 0)


def test_pack_refuses_a_clip_recipe_without_pyav_before_touching_the_output(tmp_path, monkeypatch):
    from patchloom.store import pack_to_dir

    shard = write_shard(tmp_path / "c.tar", [("c0", {"mp4": clip_bytes(8)})])
    monkeypatch.setitem(__import__("sys").modules, "av", None)
    out = tmp_path / "packed"
    with pytest.raises(MissingExtraError, match=r"patchloom\[video\]"):
        pack_to_dir(recipe(source={"shards": str(shard)}), out, workers=2, progress=False)
    assert not out.exists()


def test_the_torch_dataset_refuses_a_clip_recipe_without_pyav_in_the_main_process(monkeypatch):
    pytest.importorskip("torch")
    from patchloom.adapters.torch import PatchloomDataset

    monkeypatch.setitem(__import__("sys").modules, "av", None)
    with pytest.raises(MissingExtraError, match=r"patchloom\[video\]"):
        PatchloomDataset(recipe(source={"shards": "unused-*.tar"}))
