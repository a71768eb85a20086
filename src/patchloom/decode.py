"""Bytes -> RGB uint8 pixels, header first.

`open_image` reads only the header, so the size guard (`decode.pixel_limit`) runs before any pixel
is decoded and the sizing stage can plan from the display size. `OpenedImage.decode` then decodes,
applies the EXIF orientation, converts any Pillow mode to RGB (16-bit data scaled, alpha composited
on a background, embedded ICC profiles converted to sRGB) and returns a PIL image.

Two decoders share one contract. Baseline and progressive JPEGs in RGB or grey, with no colour
profile other than sRGB, are decoded by libjpeg-turbo through simplejpeg, which returns numpy
pixels directly and scales in the DCT (1/2, 1/4, 1/8) faster than Pillow's draft mode; everything
else (PNG, WebP, CMYK and Adobe JPEGs, non-sRGB ICC profiles, any JPEG simplejpeg refuses) goes
through Pillow. Both paths pick the same DCT scale (the strongest of 1/2, 1/4, 1/8 that keeps the
decoded size at least twice the planned size), apply the same EXIF orientation, and give pixels within
rounding of each other; `decode_path_counts()` says which path each decode took.

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

try:  # littlecms support is optional in Pillow builds; without it ICC profiles are ignored.
    from PIL import ImageCms
except ImportError:  # pragma: no cover - depends on the Pillow build
    ImageCms = None  # type: ignore[assignment]

try:  # libjpeg-turbo binding; without it every JPEG takes the Pillow path.
    import simplejpeg
except ImportError:  # pragma: no cover - a platform without a wheel
    simplejpeg = None  # type: ignore[assignment]

__all__ = [
    "DCT_SCALES",
    "FORMATS",
    "REDUCE_MARGIN",
    "DecodeError",
    "OpenedImage",
    "dct_scale",
    "decode_path_counts",
    "decode_rgb",
    "open_image",
    "reset_decode_path_counts",
    "to_rgb",
]

#: The JPEG DCT scalings we use: powers of two only. libjpeg-turbo also offers n/8 factors, which
#: cost more than a full decode on typical images and look worse.
DCT_SCALES: tuple[int, ...] = (8, 4, 2)

#: A reduced decode must stay at least this many times the planned size on both sides, so the
#: antialiased resize that follows has real detail to average (at 1x the result visibly softens).
REDUCE_MARGIN = 2

# How many decodes took each path in this process: "simplejpeg", "pillow". Tests and benchmarks
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

_SIXTEEN_BIT = ("I;16", "I;16B", "I;16L", "I;16N")

# Which ICC colour space an (8-bit) Pillow mode must carry for the profile to apply to it.
_ICC_SPACE = {"L": "GRAY", "RGB": "RGB", "CMYK": "CMYK", "LAB": "LAB"}


class DecodeError(ValueError):
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
        scale = 1
        if reduce_to is not None and img.format in ("JPEG", "MPO"):
            scale = dct_scale(img.size, _stored(reduce_to, self.orientation))
        fast = self._decode_fast(scale) if self.data else None
        if fast is not None:
            _PATHS["simplejpeg"] += 1
            img.close()
            rgb = Image.fromarray(fast)
            method = _TRANSPOSE.get(self.orientation)
            return rgb if method is None else rgb.transpose(method)
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

    def _decode_fast(self, scale: int) -> np.ndarray | None:
        """Stored-orientation RGB pixels from libjpeg-turbo at 1/scale, or None to use Pillow.

        Only plain JPEGs qualify: format JPEG (not MPO), mode RGB or L (so not CMYK/YCCK or Adobe
        inverted data), no colour profile unless it is sRGB. Any error or surprise (truncated
        data, an unexpected output size) returns None, so Pillow decides and words the error.
        """
        img = self.image
        if simplejpeg is None or img.format != "JPEG" or img.mode not in ("RGB", "L"):
            return None
        if "adobe" in img.info or not _is_srgb(img.info.get("icc_profile")):
            return None
        w, h = img.size
        out_w, out_h = -(-w // scale), -(-h // scale)
        try:
            pixels = simplejpeg.decode_jpeg(self.data, "RGB", min_height=out_h, min_width=out_w, strict=True)
        except (ValueError, RuntimeError, OSError):
            return None
        if pixels.shape != (out_h, out_w, 3):
            return None
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


def open_image(data: bytes, *, pixel_limit: int) -> OpenedImage:
    """Read only the header; raise DecodeError if not an image or if it has over `pixel_limit`.

    The pixel check runs on the header size, before any pixel is decoded (decompression-bomb
    guard). Pillow's own warning for large images is silenced here because our limit governs.
    """
    if pixel_limit < 1:
        raise ValueError(f"pixel_limit must be >= 1 (got {pixel_limit})")
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


def decode_rgb(
    data: bytes,
    *,
    pixel_limit: int = 64_000_000,
    background: tuple[int, int, int] = (255, 255, 255),
) -> np.ndarray:
    """Convenience: encoded bytes -> HxWx3 uint8 array (display orientation, sRGB)."""
    rgb = open_image(data, pixel_limit=pixel_limit).decode(background=background)
    return np.array(rgb, dtype=np.uint8)


# ----------------------------------------------------------------------------- helpers


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


def _check_background(background: tuple[int, int, int]) -> tuple[int, int, int]:
    values = tuple(int(c) for c in background)
    if len(values) != 3 or any(not 0 <= c <= 255 for c in values):
        raise ValueError(f"background must be three values in 0..255 (got {background!r})")
    return values  # type: ignore[return-value]


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
    return img, np.where(hit, 0, 255).astype(np.uint8)


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
    v = np.clip(arr.astype(np.int64), 0, 65535)
    # Exact rounding in integers: v * 255 / 65535 is never exactly k + 1/2, so +32767 floors right.
    return ((v * 255 + 32767) // 65535).astype(np.uint8)


def _scale_float(arr: np.ndarray) -> np.ndarray:
    """Float data -> uint8: 0..1 if the largest finite value is <= 1, else 0..255.

    Float images come both as 0..1 (float TIFFs) and as 0..255 (Pillow's own convert("F")), so
    the range is read from the data. NaN and -inf become black, +inf white.
    """
    v = arr.astype(np.float64)
    finite = np.isfinite(v)
    top = float(v[finite].max()) if finite.any() else 0.0
    scale = 255.0 if top <= 1.0 else 1.0
    v = np.nan_to_num(v, nan=0.0, posinf=255.0 / scale, neginf=0.0)
    return np.clip(np.rint(v * scale), 0, 255).astype(np.uint8)


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
    """Blend RGB over a solid background: round((c * a + b * (255 - a)) / 255) per channel."""
    c = np.asarray(rgb, dtype=np.int32)
    a = alpha.astype(np.int32)[..., None]
    b = np.asarray(bg, dtype=np.int32).reshape(1, 1, 3)
    # (x + 127) // 255 rounds x / 255 exactly: x / 255 is never k + 1/2 for integer x.
    out = (c * a + b * (255 - a) + 127) // 255
    return Image.fromarray(out.astype(np.uint8))
