"""Tubelet tokens checked against plain numpy slicing of the decoded frames.

- Tubelet embedding (common practice in video transformers): a clip of frames [F, H, W, C] is cut
  into non-overlapping t x p x p blocks, each flattened into one token, the same as a 3-D
  convolution with kernel and stride (t, p, p). The reference takes the frames straight from PyAV
  (`to_ndarray(format="rgb24")`, no patchloom code), picks them by index, and builds token
  (s, r, c) as frames[s*t:(s+1)*t, r*p:(r+1)*p, c*p:(c+1)*p, :].reshape(-1): (frame, row, col,
  channel) order, slices one after the other, raster order inside each.
- The clip is already the size its plan asks for (a 4x6 grid of 8 px patches fills its slice
  budget exactly), so no resampling stands between the decoded frames and the tokens.
"""

from __future__ import annotations

import io

import numpy as np
import pytest

av = pytest.importorskip("av", reason="the video extra (PyAV) runs these tests: pip install 'patchloom[video]'")

from patchloom import Recipe  # noqa: E402
from patchloom.image.chain import process_record  # noqa: E402
from patchloom.read import Record  # noqa: E402

P, T = 8, 2


def _clip(n: int, h: int, w: int) -> bytes:
    """n frames of seeded noise, lossless H.264 in MP4 (4:4:4, so decoded pixels stay close to the source)."""
    rng = np.random.default_rng(7)
    buf = io.BytesIO()
    with av.open(buf, "w", format="mp4") as out:
        stream = out.add_stream("libx264", rate=12)
        stream.height, stream.width, stream.pix_fmt = h, w, "yuv444p"
        stream.options = {"crf": "0", "preset": "ultrafast"}
        for _ in range(n):
            frame = av.VideoFrame.from_ndarray(rng.integers(0, 256, (h, w, 3), dtype=np.uint8), format="rgb24")
            for packet in stream.encode(frame):
                out.mux(packet)
        for packet in stream.encode():
            out.mux(packet)
    return buf.getvalue()


def _decoded(data: bytes) -> np.ndarray:
    with av.open(io.BytesIO(data)) as c:
        return np.stack([f.to_ndarray(format="rgb24") for f in c.decode(c.streams.video[0])])


@pytest.mark.parametrize("sampling", ["uniform", "random"])
def test_tubelet_token_equals_numpy_slicing_of_decoded_frames(sampling):
    h, w = 4 * P, 6 * P
    data = _clip(14, h, w)
    recipe = Recipe.from_dict({
        "seed": 11,
        "source": {"video_keys": ["mp4"], "label_key": None, "on_error": "raise"},
        "sizing": {"patch_size": P, "max_tokens": 48, "temporal_patch": T},
        "video": {"frames": 4, "sampling": sampling},
        "packing": {"seq_len": 64},
    })
    ps = process_record(Record("c", "mem://ref.tar", 0, {"mp4": data}), recipe, 0)
    assert ps.grid == (4, 6), "the clip is planned at its own size (no resampling)"
    picks = ps.meta["clip"]["frames"]
    if sampling == "uniform":
        assert picks == [1, 5, 8, 12]  # the middle frame of each of 4 equal parts of 14
    else:
        assert picks == list(range(picks[0], picks[0] + 4))
    frames = _decoded(data)[picks]
    s, gh, gw = 2, 4, 6
    ref = np.empty((s * gh * gw, T * P * P * 3), np.uint8)
    for k in range(s):
        for r in range(gh):
            for c in range(gw):
                block = frames[k * T:(k + 1) * T, r * P:(r + 1) * P, c * P:(c + 1) * P, :]
                ref[(k * gh + r) * gw + c] = block.reshape(-1)
    np.testing.assert_array_equal(ps.patches, ref)
    assert ps.coords.tolist() == [[r, c] for _ in range(s) for r in range(gh) for c in range(gw)]
    assert ps.times.tolist() == [k for k in range(s) for _ in range(gh * gw)]
