"""Built-in demo data: a made-up survey archive of the fictional coastal town of Gullwick Point.

`make_demo_shards` draws synthetic scenes (shorelines, building fronts, receipts, panoramas,
thumbnails, charts) of very different sizes and aspect ratios, and writes them as webdataset-style
tar shards. The set deliberately mixes image formats and modes (EXIF-rotated JPEG, CMYK JPEG,
16-bit PNG, palette GIF with transparency, ...) and holds exactly one truncated JPEG, so that the
`patchloom demo` command exercises the decoder, the sizing policy and the skip ledger in seconds.
Everything is drawn with numpy (plus Pillow's ImageDraw, `demo.scenes`) from `numpy.random.SeedSequence`,
so the same seed gives byte-identical shards (with the same Pillow build); no global random state is read.

Each sample is `{key}.{ext}` (the image), `{key}.cls` (label id as ASCII text), `{key}.txt` (a
one-line caption written from what the scene drew: sky, counts, colours; UTF-8) and `{key}.json`
(key, category, label, width and height as displayed, format, mode, the same caption, and for the
special samples a `note` plus fields such as `exif_orientation` or `corrupt`). A few samples are
multi-image: one or two more views of the same scene as `{key}.1.jpg`, `{key}.2.jpg` (see `_views`;
their JSON says `views`).
"""

from __future__ import annotations

import io
import json
import re
import sys
import tarfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, features
from tqdm import tqdm

from .scenes import SCENES, Facts, draw_chart, draw_chart_on, unit_grid

__all__ = [
    "DEMO_CLASSES",
    "DEMO_CORRUPT_KEYS",
    "DEMO_KEY_PREFIX",
    "MIN_SAMPLES",
    "caption_for",
    "demo_key",
    "demo_shard_pattern",
    "make_demo_shards",
]

DEMO_CLASSES: list[str] = ["shoreline", "facade", "receipt", "panorama", "thumbnail", "chart"]
"""Label names; the index in this list is the label id stored in each sample's `.cls` member."""

DEMO_KEY_PREFIX = "gullwick"
_SHARD_STEM = "demo-"
_CORRUPT_SLOT = (0, 3)  # (shard, index) of the one truncated JPEG, the same for every seed
_MTIME = 1_700_000_000  # fixed tar member time, so shards are byte-identical run to run
_SEED_SALT = 0x6775_6C6C  # separates demo-data draws from any other use of the same seed

_CLASS_ID = {name: i for i, name in enumerate(DEMO_CLASSES)}


def demo_key(shard: int, index: int) -> str:
    """Sample key for one slot, e.g. `gullwick-s000-000017` (no dots: webdataset splits on them)."""
    return f"{DEMO_KEY_PREFIX}-s{shard:03d}-{index:06d}"


DEMO_CORRUPT_KEYS: list[str] = [demo_key(*_CORRUPT_SLOT)]
"""Keys of the deliberately corrupt samples (a truncated JPEG); the same for every seed and size."""



# --------------------------------------------------------------------------------------------
# Sizes and captions
# --------------------------------------------------------------------------------------------


def _log_uniform(rng: np.random.Generator, lo: int, hi: int) -> int:
    """An integer drawn log-uniformly from [lo, hi]: many moderate sizes, a few large ones."""
    return int(round(np.exp(rng.uniform(np.log(lo), np.log(hi)))))


def _pick_size(category: str, rng: np.random.Generator) -> tuple[int, int]:
    """(width, height) for a category, spanning its typical aspect range."""
    if category == "shoreline":  # landscape 3:2 .. 16:9
        w = _log_uniform(rng, 400, 1600)
        return w, round(w / rng.uniform(1.5, 16 / 9))
    if category == "facade":  # portrait around 2:3
        h = _log_uniform(rng, 320, 1200)
        return round(h * rng.uniform(0.55, 0.75)), h
    if category == "receipt":  # tall thin slips 1:3 .. 1:6
        w = int(rng.integers(160, 321))
        return w, round(w * rng.uniform(3.0, 6.0))
    if category == "panorama":  # very wide 5:1 .. 8:1
        h = int(rng.integers(120, 281))
        return round(h * rng.uniform(5.0, 8.0)), h
    if category == "thumbnail":  # tiny, about 4:3
        w = int(rng.integers(12, 65))
        return w, max(2, round(w * rng.uniform(0.7, 0.8)))
    side = int(rng.integers(240, 721))  # chart, square-ish
    return side, round(side * rng.uniform(0.8, 1.2))


_PLACES = ["Gullwick Point", "the Wrenfold breakwater", "Pellock Sands", "Tidewell Row",
           "Brackmoor Lane", "the old net loft", "Cindle Cove", "the tide-gauge hut", "Harbour Steps"]
_WORDS = ("no", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine", "ten", "eleven", "twelve")
_SIDE = {"left": "on the left", "middle": "in the middle", "right": "on the right"}


def _word(n: int) -> str:
    """'no', 'one', ... 'twelve', then digits."""
    return _WORDS[n] if n < len(_WORDS) else str(n)


def _count(n: int, noun: str, plural: str | None = None) -> str:
    """'three windows', 'one ridge', '14 bars'."""
    return f"{_word(n)} {noun if n == 1 else plural or noun + 's'}"


def caption_for(category: str, facts: Facts, place: str) -> str:
    """A one-line caption of a demo scene, written from the facts its renderer recorded (see
    demo.scenes) and a made-up place name, e.g. 'The sea off Cindle Cove at dusk with a sandy beach;
    the sun is on the left.'"""
    sky = "at dusk" if facts.get("sky") == "dusk" else "on a clear day"
    if category == "shoreline":
        extras = [x for x, on in (("a sandy beach", facts["beach"]),
                                  ("a lighthouse on the horizon", facts["lighthouse"])) if on]
        with_ = f" with {' and '.join(extras)}" if extras else ""
        return f"The sea off {place} {sky}{with_}; the sun is {_SIDE[facts['sun']]}."
    if category == "facade":
        sign = ", and a shop sign" if facts["sign"] else ""
        article = "An" if str(facts["wall"])[0] in "aeiou" else "A"
        lit = _word(facts["lit"]) if facts["lit"] else "none"
        return (f"{article} {facts['wall']} {'brick' if facts['brick'] else 'rendered'} house front with "
                f"{_count(facts['rows'], 'row')} of {_count(facts['cols'], 'window')}, {lit} of them lit{sign}.")
    if category == "receipt":
        return f"A paper till receipt about {facts['length']} times as tall as it is wide, with a barcode at the foot."
    if category == "panorama":
        return f"A wide view of {_count(facts['ridges'], 'hazy ridge')} above the water {sky}, seen from {place}."
    if category == "thumbnail":
        return f"A tiny preview card with a red disk {_SIDE[facts['disk']]} and a dark band below it."
    if facts.get("kind") == "line":
        return f"A line chart of tide readings at {place} with {_count(facts['series'], 'series', 'series')}."
    return f"A bar chart of catch counts at {place} with {_count(facts['bars'], 'bar')}."


# --------------------------------------------------------------------------------------------
# Encoding: each sample is drawn, then encoded as one of the variants below
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Encoded:
    """One encoded image plus what its metadata should say about it."""

    data: bytes
    ext: str
    fmt: str
    mode: str
    width: int  # as displayed (after EXIF orientation)
    height: int
    note: str = ""
    extra: tuple[tuple[str, object], ...] = ()
    caption: str = ""  # set by encoders that draw a picture of their own (else the scene's caption)


def _save(im: Image.Image, fmt: str, **options: object) -> bytes:
    """Encode a PIL image to bytes."""
    buf = io.BytesIO()
    im.save(buf, fmt, **options)
    return buf.getvalue()


def _jpeg(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """Ordinary RGB JPEG with varied quality, chroma subsampling and sometimes progressive scan."""
    h, w = arr.shape[:2]
    data = _save(Image.fromarray(arr), "JPEG", quality=int(rng.integers(72, 91)),
                 subsampling=int(rng.choice([0, 2, 2, 2])), progressive=bool(rng.random() < 0.15))
    return _Encoded(data, "jpg", "JPEG", "RGB", w, h)


def _png(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """Ordinary RGB PNG."""
    h, w = arr.shape[:2]
    return _Encoded(_save(Image.fromarray(arr), "PNG"), "png", "PNG", "RGB", w, h)


@dataclass(frozen=True, slots=True)
class _Special:
    """A sample with a fixed category, size and encoding, placed so that every demo set has it."""

    name: str
    category: str
    size: tuple[int, int]  # (width, height) as displayed
    encode: Callable[[np.ndarray, np.random.Generator], _Encoded]


def _enc_exif_rotated(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """JPEG whose pixels are stored rotated 90 degrees counter-clockwise with EXIF orientation 6."""
    h, w = arr.shape[:2]
    stored = Image.fromarray(arr).transpose(Image.Transpose.ROTATE_90)  # displays upright after orientation
    exif = Image.Exif()
    exif[0x0112] = 6
    data = _save(stored, "JPEG", quality=82, exif=exif.tobytes())
    return _Encoded(data, "jpg", "JPEG", "RGB", w, h, "EXIF orientation 6: stored pixels are rotated",
                    (("exif_orientation", 6), ("stored_width", h), ("stored_height", w)))


def _enc_gray_png(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """8-bit grayscale (L) PNG, as from a document scanner."""
    im = Image.fromarray(arr).convert("L")
    return _Encoded(_save(im, "PNG"), "png", "PNG", "L", im.width, im.height, "grayscale scan")


def _enc_rgba_png(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """RGBA PNG chart: fully transparent outside the plot area (the renderer is redrawn on alpha)."""
    h, w = arr.shape[:2]
    im = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    facts: Facts = {}
    draw_chart_on(ImageDraw.Draw(im), w, h, rng, facts)
    return _Encoded(_save(im, "PNG"), "png", "PNG", "RGBA", w, h, "transparent background",
                    caption=f"A {facts['kind']} chart on a transparent background.")


def _enc_palette_gif(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """Palette GIF icon (a life ring) whose background and centre use the transparent index 0."""
    h, w = arr.shape[:2]
    y, x = unit_grid(h, w)
    dy, dx = (y - 0.5) * h, (x - 0.5) * w
    r = np.sqrt(dx ** 2 + dy ** 2) / (0.5 * min(h, w))
    quadrant = ((np.arctan2(dy, dx) + np.pi) // (np.pi / 2)).astype(np.int32) % 2  # alternating quarters
    idx = np.zeros((h, w), np.uint8)  # 0 = transparent
    idx[(r > 0.4) & (r < 0.95)] = 1  # dark outline
    band = (r > 0.47) & (r < 0.88)
    idx[band] = np.where(quadrant == 0, 2, 3)[band]  # red and white quarters
    im = Image.frombytes("P", (w, h), idx.tobytes())
    im.putpalette([0, 0, 0, 30, 30, 40, 220, 60, 40, 245, 245, 240] + [0, 0, 0] * 252)
    data = _save(im, "GIF", transparency=0, optimize=False)
    return _Encoded(data, "gif", "GIF", "P", w, h, "palette with transparent index 0",
                    caption="A red and white life ring on a transparent background.")


def _enc_png16(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """16-bit grayscale PNG (mode I;16): a smooth tide-height field using the full 0..65535 range."""
    h, w = arr.shape[:2]
    y, x = unit_grid(h, w)
    field = (np.sin(2 * np.pi * (1.5 * x + rng.uniform())) * np.cos(2 * np.pi * (1.2 * y + rng.uniform()))
             + 0.5 * np.sin(2 * np.pi * 4 * (x + y)))
    field = (field - field.min()) / max(1e-6, float(np.ptp(field)))
    im = Image.fromarray(np.round(field * 65535).astype(np.uint16))
    return _Encoded(_save(im, "PNG"), "png", "PNG", "I;16", w, h, "16-bit grayscale height map",
                    caption="A grey height map of the tide: smooth waves of light and dark.")


def _enc_cmyk_jpeg(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """CMYK JPEG, as from a print workflow."""
    h, w = arr.shape[:2]
    data = _save(Image.fromarray(arr).convert("CMYK"), "JPEG", quality=85)
    return _Encoded(data, "jpg", "JPEG", "CMYK", w, h, "CMYK colour")


def _enc_webp(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """Lossy RGB WebP."""
    h, w = arr.shape[:2]
    return _Encoded(_save(Image.fromarray(arr), "WEBP", quality=80, method=4), "webp", "WEBP", "RGB", w, h)


def _enc_bmp(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """Uncompressed 24-bit BMP."""
    h, w = arr.shape[:2]
    return _Encoded(_save(Image.fromarray(arr), "BMP"), "bmp", "BMP", "RGB", w, h)


def _enc_tiff(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """RGB TIFF, LZW-compressed where Pillow has libtiff."""
    h, w = arr.shape[:2]
    options = {"compression": "tiff_lzw"} if features.check("libtiff") else {}
    return _Encoded(_save(Image.fromarray(arr), "TIFF", **options), "tiff", "TIFF", "RGB", w, h)


def _enc_truncated_jpeg(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """A baseline JPEG cut off partway through its scan data: the header parses, decoding fails."""
    h, w = arr.shape[:2]
    full = _save(Image.fromarray(arr), "JPEG", quality=85)
    return _Encoded(full[: len(full) * 2 // 5], "jpg", "JPEG", "RGB", w, h,
                    "CORRUPT: truncated JPEG (deliberate; should be skipped)", (("corrupt", True),))


_CORRUPT = _Special("truncated JPEG", "shoreline", (1024, 640), _enc_truncated_jpeg)
_SPECIALS: list[_Special] = [
    _Special("JPEG with EXIF orientation 6", "shoreline", (1600, 900), _enc_exif_rotated),
    _Special("grayscale (L) PNG, 1:6", "receipt", (240, 1440), _enc_gray_png),
    _Special("RGBA PNG with transparency", "chart", (480, 400), _enc_rgba_png),
    _Special("palette GIF with transparency", "thumbnail", (64, 64), _enc_palette_gif),
    _Special("16-bit grayscale PNG (I;16)", "chart", (320, 240), _enc_png16),
    _Special("CMYK JPEG", "facade", (400, 600), _enc_cmyk_jpeg),
    _Special("WebP panorama, 8:1", "panorama", (1600, 200), _enc_webp),
    _Special("BMP", "facade", (160, 240), _enc_bmp),
    _Special("TIFF", "chart", (360, 300), _enc_tiff),
    _Special("3x2 thumbnail JPEG", "thumbnail", (3, 2), _jpeg),
    _Special("5:1 panorama JPEG", "panorama", (1250, 250), _jpeg),
]
MIN_SAMPLES = len(_SPECIALS) + 1
"""Smallest demo that still holds every special sample plus the corrupt one."""

_WEIGHTS = {"shoreline": 0.26, "facade": 0.2, "receipt": 0.14, "panorama": 0.1, "thumbnail": 0.14, "chart": 0.16}


#: Every MULTI_VIEW_EVERY-th ordinary slot (index % MULTI_VIEW_EVERY == MULTI_VIEW_AT) is a multi-image
#: sample: besides its image it holds 1 or 2 more views of the same scene as `{key}.1.jpg`, `{key}.2.jpg`
#: (read by recipes with source.images_per_sample: all; the others read the first image only).
MULTI_VIEW_EVERY, MULTI_VIEW_AT = 16, 5


def _views(seed: int, shard: int, index: int, pixels: np.ndarray) -> dict[str, bytes]:
    """The extra views of a multi-view slot (else none): crops of the drawn scene, panning from left to
    right over 60 % of its width and 80 % of its height, each a JPEG from the slot's own generator."""
    if index % MULTI_VIEW_EVERY != MULTI_VIEW_AT:
        return {}
    rng = np.random.default_rng(np.random.SeedSequence([_SEED_SALT, int(seed), shard, index, 1]))
    n = 1 + (index // MULTI_VIEW_EVERY) % 2
    h, w = pixels.shape[:2]
    ch, cw = max(1, round(0.8 * h)), max(1, round(0.6 * w))
    out = {}
    for k in range(1, n + 1):
        left = round((w - cw) * k / n)
        top = int(rng.integers(0, h - ch + 1))
        out[f"{k}.jpg"] = _jpeg(np.ascontiguousarray(pixels[top : top + ch, left : left + cw]), rng).data
    return out


def _special_slots(shards: int, per_shard: int) -> dict[tuple[int, int], _Special]:
    """Place the special samples round-robin over the shards' first slots, the corrupt one fixed."""
    slots = {_CORRUPT_SLOT: _CORRUPT}
    order = [(s, i) for i in range(per_shard) for s in range(shards) if (s, i) != _CORRUPT_SLOT]
    slots.update(zip(order, _SPECIALS))
    return slots


def _sample(seed: int, shard: int, index: int, special: _Special | None) -> tuple[dict[str, bytes], dict]:
    """Draw and encode one sample; returns its tar members (by extension) and its metadata."""
    rng = np.random.default_rng(np.random.SeedSequence([_SEED_SALT, int(seed), shard, index]))
    if special is not None:
        category, (w, h) = special.category, special.size
        encode = special.encode
    else:
        names = list(_WEIGHTS)
        category = names[int(rng.choice(len(names), p=np.array(list(_WEIGHTS.values())) / sum(_WEIGHTS.values())))]
        w, h = _pick_size(category, rng)
        lossless = (category == "chart" and rng.random() < 0.4) or (category == "thumbnail" and rng.random() < 0.2)
        encode = _png if lossless else _jpeg
    noisy_chart = category == "chart" and encode is _jpeg
    facts: Facts = {}
    pixels = draw_chart(h, w, rng, facts, noise=2.0) if noisy_chart else SCENES[category](h, w, rng, facts)
    enc = encode(pixels, rng)
    key = demo_key(shard, index)
    caption = enc.caption or caption_for(category, facts, _PLACES[int(rng.integers(len(_PLACES)))])
    meta: dict[str, object] = {
        "key": key, "category": category, "label": _CLASS_ID[category], "width": enc.width, "height": enc.height,
        "format": enc.fmt, "mode": enc.mode, "caption": caption,
    }
    if enc.note:
        meta["note"] = enc.note
    meta.update(dict(enc.extra))
    views = _views(seed, shard, index, pixels) if special is None else {}
    if views:
        meta["views"] = 1 + len(views)
    members = {
        enc.ext: enc.data,
        "cls": str(_CLASS_ID[category]).encode("ascii"),
        "json": json.dumps(meta, ensure_ascii=False, sort_keys=True).encode("utf-8"),
        "txt": caption.encode("utf-8"),
    }
    members.update(views)
    return members, meta


def _add_member(tar: tarfile.TarFile, name: str, data: bytes) -> None:
    """Append one file with fixed owner, mode and time, so the archive bytes are reproducible."""
    info = tarfile.TarInfo(name)
    info.size, info.mtime, info.mode = len(data), _MTIME, 0o644
    info.uid = info.gid = 0
    info.uname = info.gname = ""
    tar.addfile(info, io.BytesIO(data))


def make_demo_shards(out_dir: str | Path, *, shards: int = 4, per_shard: int = 40, seed: int = 0,
                     progress: bool = True) -> list[Path]:
    """Write shards out_dir/demo-000000.tar ... deterministically; return their paths.

    Also writes out_dir/classes.json (the label names) and out_dir/README.txt (what the data is).
    Stale `demo-NNNNNN.tar` files beyond `shards` are removed so the folder matches its pattern.
    """
    if shards < 1 or per_shard < _CORRUPT_SLOT[1] + 1 or shards * per_shard < MIN_SAMPLES:
        raise ValueError(f"demo needs shards >= 1, per_shard >= {_CORRUPT_SLOT[1] + 1} and "
                         f"shards * per_shard >= {MIN_SAMPLES}; got shards={shards}, per_shard={per_shard}")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    specials = _special_slots(shards, per_shard)
    listed: list[tuple[str, _Special]] = []
    paths: list[Path] = []
    counts = {name: 0 for name in DEMO_CLASSES}
    formats: dict[str, int] = {}
    with tqdm(total=shards * per_shard, desc="demo shards", unit="img", file=sys.stderr,
              disable=not progress, leave=False) as bar:
        for s in range(shards):
            path = out / f"{_SHARD_STEM}{s:06d}.tar"
            tmp = path.with_name(path.name + ".tmp")
            with tarfile.open(tmp, "w", format=tarfile.USTAR_FORMAT) as tar:
                for i in range(per_shard):
                    members, meta = _sample(seed, s, i, specials.get((s, i)))
                    for ext in sorted(members):
                        _add_member(tar, f"{meta['key']}.{ext}", members[ext])
                    counts[str(meta["category"])] += 1
                    label = f"{meta['format']} {meta['mode']}"
                    formats[label] = formats.get(label, 0) + 1
                    if (s, i) in specials:
                        listed.append((str(meta["key"]), specials[(s, i)]))
                    bar.update(1)
            tmp.replace(path)
            paths.append(path)
    for stale in out.glob(f"{_SHARD_STEM}*.tar"):
        match = re.fullmatch(rf"{_SHARD_STEM}(\d{{6}})\.tar", stale.name)
        if match and int(match.group(1)) >= shards:
            stale.unlink()
    (out / "classes.json").write_text(json.dumps(DEMO_CLASSES, indent=2) + "\n", encoding="utf-8")
    (out / "README.txt").write_text(_readme(out, shards, per_shard, seed, counts, formats, listed), encoding="utf-8")
    return paths


def _readme(out: Path, shards: int, per_shard: int, seed: int, counts: dict[str, int],
            formats: dict[str, int], listed: list[tuple[str, _Special]]) -> str:
    """Plain-text description of a generated demo folder."""
    lines = [
        "Gullwick Point survey archive (patchloom demo data)",
        "=" * 51,
        "",
        "A made-up field-survey archive of a fictional coastal town. Every image is drawn by",
        "patchloom.demo.data from a seed; no real people, places or photographs are involved.",
        "The images vary wildly in size, aspect ratio, format and mode on purpose, to exercise",
        "decoding, aspect-preserving sizing and packing.",
        "",
        f"shards: {shards} x {per_shard} samples, seed {seed}",
        f"pattern: {demo_shard_pattern(out, shards=shards)}",
        "",
        "Each sample is {key}.{ext} (the image), {key}.cls (label id as text), {key}.txt (a",
        "caption of what the scene shows) and {key}.json (category, label, width and height as",
        "displayed, format, mode, caption).",
        "",
        f"Every {MULTI_VIEW_EVERY}th sample (index {MULTI_VIEW_AT}, {MULTI_VIEW_AT + MULTI_VIEW_EVERY}, ...) also holds",
        "one or two more views of its scene as {key}.1.jpg, {key}.2.jpg (source.images_per_sample: all).",
        "",
        "Classes (label id: name, count):",
        *(f"  {i}: {name} ({counts[name]})" for i, name in enumerate(DEMO_CLASSES)),
        "",
        "Formats and modes (count):",
        *(f"  {name}: {n}" for name, n in sorted(formats.items())),
        "",
        "Special samples:",
        *(f"  {key}  {sp.name} ({sp.category}, {sp.size[0]}x{sp.size[1]})" for key, sp in listed),
        "",
        "Corrupt samples (deliberately truncated; a reader should skip them and record why):",
        *(f"  {key}" for key in DEMO_CORRUPT_KEYS),
        "",
    ]
    return "\n".join(lines)


def demo_shard_pattern(out_dir: str | Path, *, shards: int | None = None) -> str:
    """Brace pattern for the demo shards, e.g. `.../demo-{000000..000003}.tar`.

    `shards` defaults to the number of demo shards found in `out_dir` (4 if there are none yet).
    """
    out = Path(out_dir)
    if shards is None:
        found = [p for p in out.glob(f"{_SHARD_STEM}*.tar") if re.fullmatch(rf"{_SHARD_STEM}\d{{6}}\.tar", p.name)]
        shards = len(found) or 4
    if shards < 1:
        raise ValueError(f"shards must be >= 1, got {shards}")
    return str(out / f"{_SHARD_STEM}{{{0:06d}..{shards - 1:06d}}}.tar")
