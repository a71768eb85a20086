"""Bytes -> RGB uint8 pixels, header first.

`open_image` reads only the header, so the size guards (`decode.pixel_limit`, and
`decode.memory_limit` on the bytes the decode will hold) run before any pixel is decoded and the
sizing stage can plan from the display size. `OpenedImage.decode` then decodes,
applies the EXIF orientation, converts any Pillow mode to RGB (16-bit data scaled, alpha composited
on a background, embedded ICC profiles converted to sRGB) and returns a PIL image.

Three decoders share one contract. Baseline and progressive JPEGs in RGB or grey, with no colour
profile other than sRGB, are decoded by libjpeg-turbo through simplejpeg, which returns numpy
pixels directly and scales in the DCT (1/2, 1/4, 1/8) faster than Pillow's draft mode; 8-bit RGB,
RGBA and grey PNGs and palette PNGs without transparency, with no colour profile other than sRGB,
are decoded by libspng through pyspng; everything else (16-bit and low-bit PNGs, PNG colour keys,
WebP, CMYK and Adobe JPEGs, non-sRGB ICC profiles, anything a fast decoder refuses) goes through
Pillow. Both JPEG paths pick the same DCT scale (the strongest of 1/2, 1/4, 1/8 that keeps the
decoded size at least twice the planned size); every path applies the same EXIF orientation and
alpha compositing and gives pixels within rounding of the others (PNG: identical);
`decode_path_counts()` says which path each decode took.

A fast path hands its numpy pixels on inside a `DecodedImage`, a PIL image that gives them to
numpy (`np.asarray`) without a copy and makes Pillow's own copy only when Pillow code touches it.

Nothing here touches Pillow's process-wide settings (`Image.MAX_IMAGE_PIXELS`,
`ImageFile.LOAD_TRUNCATED_IMAGES`): the pixel limit is per call.
"""

from __future__ import annotations

import functools
import io
import re
import warnings
from collections import Counter
from dataclasses import dataclass, field

import numpy as np
from PIL import Image

from ..errors import PatchloomError
from .fastpath import DecodedImage, FastDecode, fast_pixels, orient_pixels

try:  # littlecms support is optional in Pillow builds; without it ICC profiles are ignored.
    from PIL import ImageCms
except ImportError:  # pragma: no cover - depends on the Pillow build
    ImageCms = None  # type: ignore[assignment]

try:  # libjpeg-turbo binding; without it every JPEG takes the Pillow path.
    import simplejpeg
except ImportError:  # pragma: no cover - a platform without a wheel
    simplejpeg = None  # type: ignore[assignment]

try:  # libspng binding; without it every PNG takes the Pillow path.
    import pyspng
except ImportError:  # pragma: no cover - a platform without a wheel
    pyspng = None  # type: ignore[assignment]

__all__ = [
    "DCT_SCALES",
    "FORMATS",
    "DecodedImage",
    "FastDecode",
    "MEMORY_LIMIT",
    "REDUCE_MARGIN",
    "DecodeError",
    "OpenedImage",
    "dct_scale",
    "decode_memory",
    "decode_path_counts",
    "composite_pixels",
    "decode_rgb",
    "fast_pixels",
    "fast_rgb",
    "open_image",
    "orient_pixels",
    "reset_decode_path_counts",
    "to_rgb",
]

#: The JPEG DCT scalings we use: powers of two only. libjpeg-turbo also offers n/8 factors, which
#: cost more than a full decode on typical images and look worse.
DCT_SCALES: tuple[int, ...] = (8, 4, 2)

#: A reduced decode must stay at least this many times the planned size on both sides, so the
#: antialiased resize that follows has real detail to average (at 1x the result visibly softens).
REDUCE_MARGIN = 2

# How many decodes took each path in this process: "simplejpeg", "pyspng", "pillow". Tests and benchmarks
# read it through decode_path_counts(); it is never used to make decisions.
_PATHS: Counter[str] = Counter()

#: Formats Pillow may try on our bytes. Keeping the list short means Pillow never runs plugins we
#: have no use for on untrusted data. Multi-picture JPEGs from phones come through "JPEG" and
#: report their format as "MPO".
FORMATS: tuple[str, ...] = ("JPEG", "PNG", "WEBP", "GIF", "BMP", "TIFF")

_ORIENTATION_TAG = 0x0112

# EXIF orientation -> the Pillow transpose that makes the stored pixels display upright.
_TRANSPOSE = {
    2: Image.Transpose.FLIP_LEFT_RIGHT,
    3: Image.Transpose.ROTATE_180,
    4: Image.Transpose.FLIP_TOP_BOTTOM,
    5: Image.Transpose.TRANSPOSE,
    6: Image.Transpose.ROTATE_270,  # Pillow rotates counter-clockwise: 270 ccw == 90 clockwise
    7: Image.Transpose.TRANSVERSE,
    8: Image.Transpose.ROTATE_90,
}

# PNGs libspng decodes exactly as Pillow does: (Pillow mode, raw mode) -> pyspng output format.
# Palette images come out as RGB (the palette looked up, as Pillow's convert does).
_PNG_FAST = {("RGB", "RGB"): "RGB", ("RGBA", "RGBA"): "RGBA", ("L", "L"): "L",
             **{("P", raw): "RGB" for raw in ("P", "P;1", "P;2", "P;4")}}

_SIXTEEN_BIT = ("I;16", "I;16B", "I;16L", "I;16N")

#: numpy conversions run over row bands of about this many pixels, so their temporaries (int64 or
#: float64 copies) stay at a few MB whatever the image size.
_BAND_PIXELS = 1 << 18

#: Default for `open_image(memory_limit=)` and the recipe's `decode.memory_limit`: 1 GiB. Every
#: opaque 8-bit RGB or grey image the default pixel_limit (64 M pixels) admits stays under it (at
#: most 11 bytes a pixel, 704 MB, for a rotated JPEG), so ordinary photos are not refused; an
#: RGBA image (22 bytes a pixel) is refused past about 48 M pixels instead of taking 1.4 GB at the
#: pixel limit.
MEMORY_LIMIT = 1 << 30

# Decode memory model (what `decode_memory` counts), in bytes per pixel of the stored image.
# Pillow holds a decoded image at 1 byte a pixel for modes 1, L and P, 2 for I;16, and 4 for every
# other mode (3- and 4-band 8-bit modes alike, I and F). A 16-bit PNG or TIFF in RGB(A) is read
# into that 8-bit RGB(A) buffer line by line, so its 16-bit samples never exist at full size. On top
# of the decoded buffer, decode() holds at its peak:
# - the RGB conversion: a 4-byte RGB copy (RGB itself: none, or the colour-profile conversion when
#   the header carries a profile; a plain RGB or grey JPEG may take the libjpeg-turbo path instead,
#   a 3-byte array beside a 4-byte image and no Pillow buffer, so at least 7 bytes in all);
#   mode 1 adds 2 (a bool and a uint8 plane); I;16 adds its array copy 2, the 8-bit result 1 and
#   its image 1 (8 in all); I and F add 4 + 1 + 1 (10 in all); LA adds its L plane 1; the
#   premultiplied and palette-alpha modes (La, RGBa, PA, P with transparency) add the 4-byte
#   unpacked copy Pillow makes first;
# - alpha compositing (any alpha band or transparency key): the alpha plane 1, the RGB pixels as
#   an array 3, the blended array 3 and its image 4, plus 3 of slack measured on top of those
#   buffers (row bands, the byte copy Pillow makes to hand pixels to numpy, allocator): 14;
# - an EXIF rotation or flip: the transposed 4-byte copy.
# Measured peaks (resident-memory growth over decode() of 2000x2000 images in each mode) are within
# 0.3 bytes a pixel above the model or under it. Not counted: a few MB of row-band temporaries and
# decoder line buffers, and what the caller does with the RGB image afterwards.
_HELD_BYTES = {"1": 1, "L": 1, "P": 1, **{m: 2 for m in _SIXTEEN_BIT}}
_RGB_COPY = 4
_CONVERT_BYTES = {"1": _RGB_COPY + 2, "LA": _RGB_COPY + 1, "La": 2 * _RGB_COPY + 1, "RGBa": 2 * _RGB_COPY,
                  "PA": 2 * _RGB_COPY, "I": 10, "F": 10, **{m: 8 for m in _SIXTEEN_BIT}}
_FAST_JPEG_BYTES = 7
_COMPOSITE_BYTES = 14
_ALPHA_MODES = ("RGBA", "LA", "La", "RGBa", "PA")

# Which ICC colour space an (8-bit) Pillow mode must carry for the profile to apply to it.
_ICC_SPACE = {"L": "GRAY", "RGB": "RGB", "CMYK": "CMYK", "LAB": "LAB"}


class DecodeError(PatchloomError, ValueError):
    """Bytes that cannot become an image (message says why and what to change)."""


@dataclass(slots=True)
class OpenedImage:
    """A Pillow image whose header is read but whose pixels are not yet decoded."""

    image: Image.Image
    format: str
    mode: str
    width: int
    height: int
    orientation: int
    data: bytes = field(default=b"", repr=False)  # the encoded bytes, for the libjpeg-turbo path

    def decode(
        self,
        *,
        background: tuple[int, int, int] = (255, 255, 255),
        reduce_to: tuple[int, int] | None = None,
    ) -> Image.Image:
        """Decode pixels to an RGB-mode PIL image with orientation applied.

        `reduce_to` (width, height) is the display size the caller will resize to. For JPEG it
        lets the decoder skip detail (DCT scaling by 1/2, 1/4 or 1/8) while the result stays at
        least `reduce_to` in both axes, so the result may be smaller than (width, height); other
        formats ignore it. Call once: the underlying Pillow image is consumed.
        """
        img = self.image
        scale = self.decode_scale(reduce_to)
        fast = self._decode_fast(scale, background) if self.data else None
        if fast is not None:
            path, pixels = fast
            _PATHS[path] += 1
            img.close()
            return DecodedImage(orient_pixels(pixels, self.orientation))
        _PATHS["pillow"] += 1
        if scale > 1:
            w, h = img.size
            img.draft(None, (max(1, w // scale), max(1, h // scale)))  # Pillow then picks exactly `scale`
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", Image.DecompressionBombWarning)
            try:
                img.load()
            except MemoryError:
                raise
            except Exception as exc:  # Pillow plugins raise many types; this is the edge.
                raise _pixel_error(exc, self) from exc
        rgb = to_rgb(img, background=background)
        if _pillow_applied_orientation(img):
            return rgb
        method = _TRANSPOSE.get(self.orientation)
        return rgb if method is None else rgb.transpose(method)

    def decode_scale(self, reduce_to: tuple[int, int] | None) -> int:
        """The DCT scale decode(reduce_to=...) uses: 1, 2, 4 or 8 for a JPEG (see dct_scale), else 1."""
        if reduce_to is None or self.image.format not in ("JPEG", "MPO"):
            return 1
        return dct_scale(self.image.size, _stored(reduce_to, self.orientation))

    def fast_decode(self, scale: int = 1) -> FastDecode | None:
        """The fast decoder call for this image at 1/scale (JPEG only scales), or None: Pillow's turn.

        JPEG (libjpeg-turbo): format JPEG (not MPO), mode RGB or L (so not CMYK/YCCK or Adobe
        inverted data), no colour profile unless it is sRGB. PNG (libspng): only what libspng gives
        exactly as Pillow does: 8-bit RGB, RGBA and grey, and palette images without transparency,
        not animated, with no colour profile other than sRGB (none at all for grey).
        """
        img = self.image
        icc = img.info.get("icc_profile")
        w, h = img.size
        if img.format == "JPEG" and simplejpeg is not None and img.mode in ("RGB", "L"):
            if "adobe" in img.info or not _is_srgb(icc):
                return None
            return FastDecode("simplejpeg", (-(-w // scale), -(-h // scale)), "RGB")
        out = _PNG_FAST.get((img.mode, _rawmode(img))) if img.format == "PNG" else None
        if pyspng is None or out is None or "transparency" in img.info or getattr(img, "n_frames", 1) != 1:
            return None
        if icc and (img.mode == "L" or not _is_srgb(icc)):
            return None
        return FastDecode("pyspng", (w, h), out)

    def _decode_fast(self, scale: int, background: tuple[int, int, int]) -> tuple[str, np.ndarray] | None:
        """(path name, stored-orientation RGB pixels) from a fast decoder, or None to use Pillow."""
        call = self.fast_decode(scale)
        pixels = None if call is None else fast_rgb(call, self.data, background)
        return None if pixels is None else (call.path, pixels)


def fast_rgb(call: FastDecode, data: bytes, background: tuple[int, int, int] = (255, 255, 255)) -> np.ndarray | None:
    """The fast decoder's stored-orientation HxWx3 pixels (fastpath.fast_pixels), RGBA composited on
    `background` by the Pillow path's rule; None to use Pillow. What decode() runs, and what the
    benchmark's kernels line repeats."""
    pixels = fast_pixels(call, data)
    if pixels is not None and pixels.shape[2] == 4:
        return composite_pixels(pixels[:, :, :3], pixels[:, :, 3], _check_background(background))
    return pixels


def decode_path_counts() -> dict[str, int]:
    """How many decodes took each path ("simplejpeg", "pillow") in this process so far."""
    return dict(_PATHS)


def reset_decode_path_counts() -> None:
    """Zero the counters of decode_path_counts()."""
    _PATHS.clear()


def dct_scale(stored: tuple[int, int], want: tuple[int, int], margin: int = REDUCE_MARGIN) -> int:
    """The JPEG DCT scale (1, 2, 4 or 8) to decode a `stored` (w, h) image for a `want` (w, h) plan.

    The largest power of two that keeps the decoded size (rounded up, as libjpeg does) at least
    `margin` times `want` on both sides, and whose rounding scales both axes alike within 1 %
    (later stages map header coordinates by one ratio). 1 means a full decode.
    """
    w, h = int(stored[0]), int(stored[1])
    want_w, want_h = int(want[0]), int(want[1])
    if want_w < 1 or want_h < 1:
        raise ValueError(f"reduce_to must be two positive sizes (got {want!r})")
    for scale in DCT_SCALES:
        out_w, out_h = -(-w // scale), -(-h // scale)
        if out_w < margin * want_w or out_h < margin * want_h:
            continue
        # Rounding up can stretch one axis more than the other on small images (17x9 / 8 -> 3x2).
        if abs(out_w / w - out_h / h) <= 0.01 * max(out_w / w, out_h / h):
            return scale
    return 1


def _stored(size: tuple[int, int], orientation: int) -> tuple[int, int]:
    """A display-orientation (w, h) as the decoder sees it (swapped for the 90-degree orientations)."""
    w, h = int(size[0]), int(size[1])
    return (h, w) if orientation >= 5 else (w, h)


@functools.lru_cache(maxsize=64)
def _srgb_profile(icc: bytes) -> bool:
    if ImageCms is None:
        return False
    try:
        profile = ImageCms.ImageCmsProfile(io.BytesIO(icc))
        return (profile.profile.xcolor_space.strip().upper() == "RGB"
                and "SRGB" in ImageCms.getProfileDescription(profile).upper())
    except (ImageCms.PyCMSError, OSError, ValueError, TypeError):
        return False


def _is_srgb(icc: bytes | None) -> bool:
    """True for no profile or an sRGB one (the fast path may skip colour management for these)."""
    if not icc:
        return True
    return _srgb_profile(bytes(icc))


def open_image(data: bytes, *, pixel_limit: int, memory_limit: int = MEMORY_LIMIT) -> OpenedImage:
    """Read only the header; raise DecodeError if not an image, if it has over `pixel_limit`
    pixels, or if decoding it would hold over `memory_limit` bytes (see `decode_memory`).

    Both checks run on the header, before any pixel is decoded (decompression-bomb guards). Pillow's
    own warning for large images is silenced here because our limits govern.
    """
    if pixel_limit < 1:
        raise ValueError(f"pixel_limit must be >= 1 (got {pixel_limit})")
    if memory_limit < 1:
        raise ValueError(f"memory_limit must be >= 1 (got {memory_limit})")
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise TypeError(f"open_image() takes the encoded bytes (got {type(data).__name__})")
    data = bytes(data)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", Image.DecompressionBombWarning)
        try:
            img = Image.open(io.BytesIO(data), formats=FORMATS)
        except Image.DecompressionBombError as exc:
            found = re.search(r"\((\d+) pixels\)", str(exc))
            size = f"image has {found.group(1)} pixels" if found else "image is too large"
            raise DecodeError(
                f"{size}, over Pillow's own hard limit of 2 x Image.MAX_IMAGE_PIXELS = "
                f"{2 * (Image.MAX_IMAGE_PIXELS or 0)} pixels, which Pillow enforces when opening, "
                f"before decode.pixel_limit={pixel_limit} is checked; drop or downscale such images "
                f"upstream (only the application, not the recipe, can raise PIL.Image.MAX_IMAGE_PIXELS)"
            ) from exc
        except MemoryError:
            raise
        except Exception as exc:  # UnidentifiedImageError, plugin SyntaxError/struct.error, ...
            raise DecodeError(
                f"not a readable image ({type(exc).__name__}: {exc}; first bytes "
                f"{data[:12].hex(' ')}, {len(data)} bytes in all); supported formats are "
                f"{', '.join(FORMATS)}: check that source.image_keys points at the image member "
                f"and that the shard is not damaged"
            ) from exc
    stored_w, stored_h = _stored_size(img)
    pixels = stored_w * stored_h
    if pixels > pixel_limit:
        img.close()
        raise DecodeError(
            f"image is {stored_w}x{stored_h} = {pixels} pixels, over decode.pixel_limit={pixel_limit}; "
            f"raise decode.pixel_limit in the recipe if these images are expected"
        )
    orientation = _orientation(img)
    need, parts = decode_memory(img, orientation=orientation)
    if need > memory_limit:
        img.close()
        raise DecodeError(
            f"image is {stored_w}x{stored_h} {img.mode}{_file_depth(img)}; decoding it would hold about "
            f"{need} bytes ({_gib(need)}: {pixels} pixels x {parts}), over decode.memory_limit={memory_limit} "
            f"({_gib(memory_limit)}); raise decode.memory_limit in the recipe if these images are expected "
            f"and each worker has that memory to spare"
        )
    width, height = (stored_h, stored_w) if orientation >= 5 else (stored_w, stored_h)
    return OpenedImage(
        image=img,
        format=str(img.format),
        mode=img.mode,
        width=width,
        height=height,
        orientation=orientation,
        data=data,
    )


def decode_memory(img: Image.Image, *, orientation: int = 1) -> tuple[int, str]:
    """Bytes decode() would hold at its peak for an opened, not yet decoded image, read from its
    header (mode, size, format, transparency, colour profile), and the per-pixel sum that gives
    them, in words for error messages. The model is described above."""
    mode = img.mode
    width, height = _stored_size(img)
    transparency = "transparency" in img.info
    held = _HELD_BYTES.get(mode, 4)
    convert = _CONVERT_BYTES.get(mode, _RGB_COPY)
    if mode == "RGB" and not img.info.get("icc_profile"):
        convert = 0  # already RGB: no copy unless a colour profile is applied
    elif mode == "P" and transparency:
        convert = 2 * _RGB_COPY  # Pillow unpacks to RGBA first
    parts = [f"{held} decoded {mode}", f"{convert} to RGB"]
    per_pixel = held + convert
    if img.format == "JPEG" and mode in ("RGB", "L") and per_pixel < _FAST_JPEG_BYTES:
        per_pixel, parts = _FAST_JPEG_BYTES, [f"{_FAST_JPEG_BYTES} libjpeg-turbo array and image"]
    if mode in _ALPHA_MODES or transparency:
        per_pixel += _COMPOSITE_BYTES
        parts.append(f"{_COMPOSITE_BYTES} alpha compositing")
    if orientation != 1:
        per_pixel += _RGB_COPY
        parts.append(f"{_RGB_COPY} EXIF rotation")
    words = f"{per_pixel} bytes ({' + '.join(parts)})" if len(parts) > 1 else f"{per_pixel} bytes ({parts[0]})"
    return int(width) * int(height) * per_pixel, words


def to_rgb(img: Image.Image, *, background: tuple[int, int, int] = (255, 255, 255)) -> Image.Image:
    """Any Pillow mode -> RGB, so every later stage sees one pixel format.

    16-bit and 32-bit integer data is scaled by 255/65535 (rounded, not clipped; mode I is first
    clamped to 0..65535); float data is taken as 0..1 when its largest value is at most 1, else
    as 0..255. Alpha (including palette or colour-key transparency) is blended onto `background`.
    An embedded ICC profile that is not sRGB is converted to sRGB; one that does not fit the
    image's colour space is ignored.
    """
    bg = _check_background(background)
    icc = img.info.get("icc_profile")
    colour, alpha = _split_alpha(img)
    colour = _to_base_mode(colour)
    rgb = _icc_to_srgb(colour, icc) if icc else None
    if rgb is None:
        rgb = colour if colour.mode == "RGB" else colour.convert("RGB")
    if alpha is not None:
        rgb = _composite(rgb, alpha, bg)
    return rgb


def upright(img: Image.Image) -> Image.Image:
    """An already opened PIL image in display orientation, by the same EXIF rule the shard path uses.

    For images that come in as PIL objects (`image_to_patches`); pixels Pillow already transposed
    on load (TIFF) are left as they are, so the image is loaded first (a TIFF opened but not yet
    loaded still shows its tag, and Pillow turns it on load).
    """
    img.load()
    if _pillow_applied_orientation(img):
        return img
    method = _TRANSPOSE.get(_orientation(img))
    return img if method is None else img.transpose(method)


def decode_rgb(
    data: bytes,
    *,
    pixel_limit: int = 64_000_000,
    memory_limit: int = MEMORY_LIMIT,
    background: tuple[int, int, int] = (255, 255, 255),
) -> np.ndarray:
    """Convenience: encoded bytes -> HxWx3 uint8 array (display orientation, sRGB)."""
    rgb = open_image(data, pixel_limit=pixel_limit, memory_limit=memory_limit).decode(background=background)
    return np.array(rgb, dtype=np.uint8)


# ----------------------------------------------------------------------------- helpers


def _rawmode(img: Image.Image) -> str:
    """The decoder's raw mode from the header (e.g. 'RGB', 'RGB;16B', 'P;4'), or '' if unknown."""
    try:
        raw = img.tile[0][3]
        raw = raw[0] if isinstance(raw, tuple) else raw
    except (IndexError, TypeError, AttributeError):
        return ""
    return raw if isinstance(raw, str) else ""


def _file_depth(img: Image.Image) -> str:
    """' (16 bits a sample in the file)' when the header says so (a PNG or TIFF raw mode), else ''."""
    return " (16 bits a sample in the file)" if ";16" in _rawmode(img) else ""


def _gib(n: int) -> str:
    return f"{n / (1 << 30):.2f} GiB" if n >= 1 << 30 else f"{n / (1 << 20):.1f} MiB"


def _orientation(img: Image.Image) -> int:
    """EXIF orientation 1..8 from the header (1 if absent or invalid), without decoding pixels."""
    # Pillow's PNG getexif() decodes the whole image to look for an eXIf chunk after the pixel
    # data; only trust one that came before it, so the header stays cheap and decode() agrees.
    if img.format == "PNG" and "exif" not in img.info:
        return 1
    try:
        value = int(img.getexif().get(_ORIENTATION_TAG, 1))
    except Exception:  # a damaged EXIF block must not cost the image
        return 1
    return value if 1 <= value <= 8 else 1


def _stored_size(img: Image.Image) -> tuple[int, int]:
    """(width, height) of the pixels as stored, before any orientation.

    Pillow's TIFF reader applies the orientation tag itself and already reports the display size
    at open; read the stored size from the TIFF tags so every format goes through one rule.
    """
    tags = getattr(img, "tag_v2", None) if img.format == "TIFF" else None
    if tags is not None:
        w, h = tags.get(256), tags.get(257)  # ImageWidth, ImageLength
        if isinstance(w, int) and isinstance(h, int) and w * h == img.size[0] * img.size[1]:
            return w, h
    return img.size


def _pillow_applied_orientation(img: Image.Image) -> bool:
    """True when Pillow already transposed the pixels on load (its TIFF reader does, then drops the tag)."""
    tags = getattr(img, "tag_v2", None) if img.format == "TIFF" else None
    return tags is not None and _ORIENTATION_TAG not in tags


def _pixel_error(exc: Exception, opened: OpenedImage) -> DecodeError:
    """Turn a Pillow failure during pixel decoding into a DecodeError saying what to do."""
    text = f"{type(exc).__name__}: {exc}"
    what = f"{opened.format} {opened.mode} {opened.width}x{opened.height}"
    if isinstance(exc, EOFError) or "truncated" in str(exc).lower():
        return DecodeError(
            f"truncated image data ({text}) in a {what} image; the file is incomplete: re-fetch or "
            f"re-encode it, or set source.on_error: skip to drop such samples"
        )
    return DecodeError(
        f"corrupt image data ({text}) in a {what} image; re-encode the file, or set "
        f"source.on_error: skip to drop such samples"
    )


def _split_alpha(img: Image.Image) -> tuple[Image.Image, np.ndarray | None]:
    """Separate colour from opacity: (colour image, uint8 alpha array or None if opaque)."""
    mode = img.mode
    if mode in ("La", "RGBa", "PA"):  # premultiplied or palette+alpha: let Pillow unpack
        img = img.convert("LA" if mode == "La" else "RGBA")
        mode = img.mode
    elif mode == "P" and "transparency" in img.info:
        img = img.convert("RGBA")  # palette index or per-entry transparency
        mode = img.mode
    if mode in ("LA", "RGBA"):
        alpha = np.asarray(img.getchannel("A"))
        colour = img.convert("L" if mode == "LA" else "RGB")
        colour.info = dict(img.info)
        return colour, alpha
    trns = img.info.get("transparency")
    if trns is None or mode not in ("1", "L", "RGB", "I", *_SIXTEEN_BIT):
        return img, None
    # Colour-key transparency (PNG tRNS on grey or RGB): one sample value is fully transparent.
    arr = np.asarray(img)
    if mode == "1":
        arr = arr.astype(np.uint8)
        trns = 1 if trns else 0
    try:
        key = np.asarray(trns, dtype=np.int64)
        hit = arr == key if arr.ndim == 2 else np.all(arr == key.reshape(1, 1, -1), axis=-1)
    except (TypeError, ValueError):  # a transparency value that does not fit the mode
        return img, None
    return img, np.where(hit, np.uint8(0), np.uint8(255))


def _to_base_mode(img: Image.Image) -> Image.Image:
    """Bring any colour-only mode to L, RGB, CMYK or LAB (the modes ICC profiles can apply to)."""
    mode = img.mode
    if mode in ("L", "RGB", "CMYK", "LAB"):
        return img
    if mode in _SIXTEEN_BIT or mode == "I":
        out = _scale_16bit(np.asarray(img))
    elif mode == "F":
        out = _scale_float(np.asarray(img))
    elif mode == "1":
        out = np.asarray(img).astype(np.uint8) * np.uint8(255)
    else:  # P, RGBX, YCbCr, HSV, and anything else Pillow can convert
        try:
            return img.convert("RGB")
        except ValueError as exc:
            raise DecodeError(f"cannot convert Pillow mode {mode} to RGB ({exc})") from exc
    gray = Image.fromarray(out)
    gray.info = dict(img.info)
    return gray


def _scale_16bit(arr: np.ndarray) -> np.ndarray:
    """0..65535 integers -> 0..255 uint8 as round(v * 255 / 65535); out-of-range values clamp."""
    out = np.empty(arr.shape, dtype=np.uint8)
    for rows in _bands(*arr.shape[:2]):
        v = np.clip(arr[rows].astype(np.int64), 0, 65535)
        # Exact rounding in integers: v * 255 / 65535 is never exactly k + 1/2, so +32767 floors right.
        out[rows] = (v * 255 + 32767) // 65535
    return out


def _scale_float(arr: np.ndarray) -> np.ndarray:
    """Float data -> uint8: 0..1 if the largest finite value is <= 1, else 0..255.

    Float images come both as 0..1 (float TIFFs) and as 0..255 (Pillow's own convert("F")), so
    the range is read from the data. NaN and -inf become black, +inf white.
    """
    row_bands = _bands(*arr.shape[:2])
    tops = []
    for rows in row_bands:
        v = arr[rows].astype(np.float64)
        finite = v[np.isfinite(v)]
        if finite.size:
            tops.append(float(finite.max()))
    scale = 255.0 if max(tops, default=0.0) <= 1.0 else 1.0
    out = np.empty(arr.shape, dtype=np.uint8)
    for rows in row_bands:
        v = np.nan_to_num(arr[rows].astype(np.float64), nan=0.0, posinf=255.0 / scale, neginf=0.0)
        out[rows] = np.clip(np.rint(v * scale), 0, 255)
    return out


def _icc_to_srgb(img: Image.Image, icc: bytes) -> Image.Image | None:
    """Convert `img` (L, RGB, CMYK or LAB) through its ICC profile to sRGB.

    Returns the image unchanged for an sRGB RGB image, and None (meaning: convert without colour
    management) when littlecms is missing, the profile is unreadable, or it does not describe
    the image's colour space (a mislabelled file).
    """
    if ImageCms is None:
        return None
    try:
        profile = ImageCms.ImageCmsProfile(io.BytesIO(icc))
        space = profile.profile.xcolor_space.strip().upper()
        if space != _ICC_SPACE.get(img.mode):
            return None
        if img.mode == "RGB" and "SRGB" in ImageCms.getProfileDescription(profile).upper():
            return img
        out = ImageCms.profileToProfile(img, profile, ImageCms.createProfile("sRGB"), outputMode="RGB")
    except (ImageCms.PyCMSError, OSError, ValueError, TypeError):
        return None
    return out if out is not None and out.mode == "RGB" else None


def _composite(rgb: Image.Image, alpha: np.ndarray, bg: tuple[int, int, int]) -> Image.Image:
    """Blend an RGB image over a solid background (see composite_pixels)."""
    return Image.fromarray(composite_pixels(np.asarray(rgb), alpha, bg))


def _check_background(background: tuple[int, int, int]) -> tuple[int, int, int]:
    values = tuple(int(c) for c in background)
    if len(values) != 3 or any(not 0 <= c <= 255 for c in values):
        raise ValueError(f"background must be three values in 0..255 (got {background!r})")
    return values  # type: ignore[return-value]


def _bands(height: int, width: int) -> list[slice]:
    """Row slices of about _BAND_PIXELS pixels each, covering `height` rows."""
    step = max(1, _BAND_PIXELS // max(1, width))
    return [slice(y, y + step) for y in range(0, height, step)]


def composite_pixels(c: np.ndarray, alpha: np.ndarray, bg: tuple[int, int, int]) -> np.ndarray:
    """Blend HxWx3 pixels over a solid background: round((c * a + b * (255 - a)) / 255) per channel.

    Row band by row band in uint16: c * a + b * (255 - a) <= 255 * 255, + 127 still fits. Fully
    opaque alpha gives the colour back exactly, so it is returned without the arithmetic."""
    if alpha.size and int(alpha.min()) == 255:
        return np.ascontiguousarray(c)
    out = np.empty(c.shape, dtype=np.uint8)
    b = np.asarray(bg, dtype=np.uint16).reshape(1, 1, 3)
    for rows in _bands(*c.shape[:2]):
        a = alpha[rows, :, None].astype(np.uint16)
        x = c[rows].astype(np.uint16)
        x *= a
        x += b * (255 - a)
        # (x + 127) // 255 rounds x / 255 exactly: x / 255 is never k + 1/2 for integer x.
        x += 127
        x //= 255
        out[rows] = x
    return out
