"""Guards on values that validate but break: the decode memory limit, float output overflow, strict
numbers, the per-batch memory cap, seed bounds, control characters, and what `extends` may load.

Each problem must come back as one line naming the key path, from Recipe and from `patchloom recipe
check`, never as a traceback.
"""

from __future__ import annotations

import io
import os
import re
import struct
import tracemalloc
import zlib

import numpy as np
import pytest
from PIL import Image, ImageFile

from patchloom import Recipe, RecipeError
from patchloom.cli.main import main
from patchloom.image.decode import MEMORY_LIMIT, DecodeError, decode_memory, decode_rgb, open_image
from patchloom.packing.packer import build_batch
from patchloom.image.patches import normalize
from patchloom.recipe import MAX_BATCH_BYTES, MAX_RECIPE_BYTES, MAX_SEED, batch_bytes
from patchloom.image.chain import SampleError, process_record
from patchloom.seeding import sample_rng
from patchloom.read import Record


def problem_lines(message: str) -> list[str]:
    return [line[2:] for line in message.splitlines()[1:] if line.startswith("  ")]


def error_of(data: dict) -> str:
    with pytest.raises(RecipeError) as info:
        Recipe.from_dict(data)
    return str(info.value)


def file_error(tmp_path, text: str | bytes, name: str = "r.yaml") -> str:
    p = tmp_path / name
    p.write_bytes(text if isinstance(text, bytes) else text.encode("utf-8"))
    with pytest.raises(RecipeError) as info:
        Recipe.from_file(p)
    return str(info.value)


# ----------------------------------------------------------------------------- decode.memory_limit


def _chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


def _png(width: int, height: int, depth: int, colour_type: int, rows: bytes) -> bytes:
    ihdr = struct.pack(">IIBBBBB", width, height, depth, colour_type, 0, 0, 0)
    return b"\x89PNG\r\n\x1a\n" + _chunk(b"IHDR", ihdr) + _chunk(b"IDAT", zlib.compress(rows)) + _chunk(b"IEND", b"")


def _rgba16_png(arr: np.ndarray) -> bytes:
    """A real 16-bit RGBA PNG from an HxWx4 uint16 array."""
    big = arr.astype(">u2")
    return _png(arr.shape[1], arr.shape[0], 16, 6, b"".join(b"\x00" + big[y].tobytes() for y in range(arr.shape[0])))


def test_16bit_rgba_png_over_memory_limit_is_refused_naming_bytes_mode_and_key():
    rng = np.random.default_rng(3)
    arr = rng.integers(0, 65536, (30, 40, 4), dtype=np.uint16)
    arr[..., 3] = 65535  # opaque, so the decoded colour is the high byte
    data = _rgba16_png(arr)
    need = 40 * 30 * (4 + 4 + 14)  # decoded RGBA + RGB copy + alpha compositing (see decode.decode_memory)
    with pytest.raises(DecodeError) as info:
        open_image(data, pixel_limit=10_000, memory_limit=need - 1)
    msg = str(info.value)
    assert "image is 40x30 RGBA (16 bits a sample in the file)" in msg
    assert f"about {need} bytes" in msg
    assert f"over decode.memory_limit={need - 1}" in msg
    assert "raise decode.memory_limit in the recipe" in msg
    assert "\n" not in msg
    # at the limit it opens, and decodes as before
    out = decode_rgb(data, pixel_limit=10_000, memory_limit=need)
    assert np.array_equal(out, (arr[..., :3] >> 8).astype(np.uint8))


def test_huge_header_is_refused_before_any_pixel_is_decoded(monkeypatch):
    header = _png(8000, 8000, 16, 6, b"\x00" * 64)  # 8000x8000 16-bit RGBA, almost no data behind it
    loads = []
    original = ImageFile.ImageFile.load
    monkeypatch.setattr(ImageFile.ImageFile, "load", lambda self: loads.append(1) or original(self))
    with pytest.raises(DecodeError):
        open_image(header, pixel_limit=64_000_000)  # warm up Pillow's plugins before measuring
    tracemalloc.start()
    try:
        with pytest.raises(DecodeError) as info:
            open_image(header, pixel_limit=64_000_000)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert loads == []
    assert peak < 2 << 20, f"the refusal allocated {peak} bytes"
    msg = str(info.value)
    assert f"about {8000 * 8000 * 22} bytes" in msg and "RGBA" in msg
    assert f"decode.memory_limit={MEMORY_LIMIT}" in msg


def test_default_limit_admits_an_opaque_rgb_image_at_the_default_pixel_limit():
    rgb = open_image(_png(8000, 8000, 8, 2, b"\x00" * 64), pixel_limit=64_000_000)  # 4 bytes a pixel
    assert (rgb.width, rgb.height) == (8000, 8000)
    with pytest.raises(DecodeError, match=r"8000x8000 RGBA; decoding it would hold about 1408000000 bytes"):
        open_image(_png(8000, 8000, 8, 6, b"\x00" * 64), pixel_limit=64_000_000)


def _encoded(img: Image.Image, fmt: str, **kw) -> bytes:
    buf = io.BytesIO()
    img.save(buf, fmt, **kw)
    return buf.getvalue()


@pytest.mark.parametrize(
    ("make", "per_pixel"),
    [
        (lambda: _encoded(Image.new("RGB", (8, 6)), "PNG"), 4),  # already RGB: the decoded buffer only
        (lambda: _encoded(Image.new("L", (8, 6)), "PNG"), 1 + 4),
        (lambda: _encoded(Image.new("RGB", (8, 6)), "JPEG"), 7),  # libjpeg-turbo array + image
        (lambda: _encoded(Image.new("RGB", (8, 6)), "JPEG", exif=_rotated()), 7 + 4),
        (lambda: _encoded(Image.new("P", (8, 6)), "PNG", transparency=0), 1 + 8 + 14),
        (lambda: _encoded(Image.new("I;16", (8, 6)), "PNG"), 2 + 8),
    ],
)
def test_decode_memory_counts_each_buffer_of_the_path(make, per_pixel):
    opened = open_image(make(), pixel_limit=1000)
    need, words = decode_memory(opened.image, orientation=opened.orientation)
    assert need == 8 * 6 * per_pixel, words
    assert words.startswith(f"{per_pixel} bytes")


def _rotated() -> Image.Exif:
    exif = Image.Exif()
    exif[0x0112] = 6
    return exif


def test_memory_limit_must_be_positive():
    with pytest.raises(ValueError, match="memory_limit must be >= 1"):
        open_image(_png(1, 1, 8, 2, b"\x00" * 4), pixel_limit=10, memory_limit=0)


def test_recipe_memory_limit_is_a_strict_positive_integer_defaulting_to_the_decoder_default():
    assert Recipe().decode.memory_limit == MEMORY_LIMIT
    assert problem_lines(error_of({"decode": {"memory_limit": 0}})) == ["decode.memory_limit: must be >= 1 (got 0)"]
    (line,) = problem_lines(error_of({"decode": {"memory_limit": True}}))
    assert line.startswith("decode.memory_limit: must be an integer, not true/false")


def test_recipe_memory_limit_reaches_the_decoder():
    """A sample over the recipe's decode.memory_limit fails in the header stage with that limit."""
    data = _encoded(Image.new("RGBA", (20, 10)), "PNG")  # 200 pixels x 22 bytes
    recipe = Recipe.from_dict({"decode": {"memory_limit": 4399}, "source": {"on_error": "raise"}})
    record = Record(key="k0", url="mem.tar", index=0, members={"png": data})
    with pytest.raises(SampleError, match=r"over decode\.memory_limit=4399"):
        process_record(record, recipe, 0)
    ok = Recipe.from_dict({"decode": {"memory_limit": 4400}, "sizing": {"patch_size": 2, "max_tokens": 64}})
    assert process_record(record, ok, 0).key == "k0"


# ----------------------------------------------------------------------------- output.std overflow


def test_std_that_overflows_float16_is_refused_naming_the_key():
    (line,) = problem_lines(error_of({"output": {"dtype": "float16", "std": [1e-30, 1, 1]}}))
    assert line.startswith("output.std: with output.dtype float16, (x/255 - mean)/std reaches 5e+29 in channel 0")
    assert "largest finite value 65504" in line and "raise std[0] to at least 7.63e-06" in line
    assert "or use output.dtype float32" in line


def test_std_that_overflows_float32_is_refused():
    (line,) = problem_lines(error_of({"output": {"dtype": "float32", "mean": [0, 0, 0], "std": [1, 1, 1e-39]}}))
    assert line.startswith("output.std: with output.dtype float32") and "channel 2" in line
    assert "float16" not in line  # no wider dtype to suggest
    # 1e-30 is fine in float32: the values stay finite (only overflow is checked)
    assert Recipe.from_dict({"output": {"dtype": "float32", "std": [1e-30, 1, 1]}}).output.std[0] == 1e-30


@pytest.mark.parametrize(("std", "finite"), [(7.7e-6, True), (7.5e-6, False)])
def test_std_guard_agrees_with_what_normalize_produces(std, finite):
    mean = (0.5, 0.5, 0.5)
    patches = np.array([[0, 0, 0, 255, 255, 255]], dtype=np.uint8)
    with np.errstate(over="ignore"):
        out = normalize(patches, mean, (std, 1.0, 1.0), "float16")
    assert bool(np.isfinite(out).all()) is finite
    data = {"output": {"dtype": "float16", "mean": list(mean), "std": [std, 1, 1]}}
    if finite:
        assert Recipe.from_dict(data).output.std[0] == std
    else:
        assert problem_lines(error_of(data))[0].startswith("output.std:")


def test_uint8_output_ignores_mean_and_std():
    assert Recipe.from_dict({"output": {"dtype": "uint8", "std": [1e-30, 1, 1]}}).output.std[0] == 1e-30


# ----------------------------------------------------------------------------- strict numbers


@pytest.mark.parametrize(
    ("data", "line"),
    [
        ({"sizing": {"patch_size": True}}, "sizing.patch_size: must be an integer, not true/false (got true)"),
        ({"packing": {"seq_len": 1e11}},
         "packing.seq_len: must be an integer, written without a decimal point or exponent (got 100000000000.0)"),
        ({"seed": 7.0}, "seed: must be an integer, written without a decimal point or exponent (got 7.0)"),
        ({"packing": {"rows": "8"}}, "packing.rows: must be an integer (got '8'); write the number without quotes"),
        ({"decode": {"background": [True, 0, 0]}},
         "decode.background.0: must be an integer, not true/false (got true)"),
        ({"crop": {"area": [False, 1]}}, "crop.area.0: must be a number, not true/false (got false)"),
        ({"patch_ops": [{"name": "noise", "sigma": True}]},
         "patch_ops.0.sigma: must be a number, not true/false (got true)"),
        ({"source": {"max_skip_ratio": True}},
         "source.max_skip_ratio: must be a number or null, not true/false (got true)"),
        ({"source": {"shuffle_shards": 1}}, "source.shuffle_shards: must be true or false (got 1)"),
        ({"epoch": {"equalize": "yes", "batches": 2}}, "epoch.equalize: must be true or false (got 'yes')"),
    ],
)
def test_numbers_and_switches_are_strict(data, line):
    assert problem_lines(error_of(data)) == [line]


def test_integers_are_still_numbers():
    r = Recipe.from_dict({"source": {"max_skip_ratio": 1}, "crop": {"mode": "random", "area": [1, 1]},
                          "output": {"dtype": "float32", "std": [1, 1, 1]}})
    assert r.source.max_skip_ratio == 1.0 and r.crop.area == (1.0, 1.0) and r.output.std == (1.0, 1.0, 1.0)


def test_yaml_numbers_read_as_numbers(tmp_path):
    p = tmp_path / "r.yaml"
    p.write_text("patch_ops: [{name: standardize, eps: 1e-6}]\noutput: {dtype: float32}\n")
    assert Recipe.from_file(p).patch_ops[0].eps == 1e-6  # YAML 1.1 alone would read 1e-6 as text
    assert problem_lines(file_error(tmp_path, "sizing:\n  patch_size: true\n")) == [
        "sizing.patch_size: must be an integer, not true/false (got true)"]
    assert problem_lines(file_error(tmp_path, "packing:\n  seq_len: 1e11\n")) == [
        "packing.seq_len: must be an integer, written without a decimal point or exponent (got 100000000000.0)"]


# ----------------------------------------------------------------------------- batch memory cap


def test_a_batch_over_the_cap_is_refused_naming_seq_len():
    (line,) = problem_lines(error_of({"packing": {"seq_len": 10**11}}))
    size = 8 * 10**11 * (768 + 12) + 8 * 16 * 16
    assert line.startswith(f"packing.seq_len: one batch would take {size / 2**30:,.1f} GiB (8 rows x "
                           f"100000000000 tokens x (768 patch values x 1 byte of uint8")
    assert line.endswith("over the 4 GiB cap per batch; lower packing.rows or packing.seq_len (got 100000000000)")


def test_a_batch_over_the_cap_by_image_slots_names_max_images_per_row():
    (line,) = problem_lines(error_of({"packing": {"max_images_per_row": 10**12}}))
    assert line.startswith("packing.max_images_per_row: one batch would take")
    assert "lower packing.rows or packing.max_images_per_row" in line


def test_the_cap_is_exact():
    token = 16 * 16 * 3 * 4 + 12  # float32 patches + segment id + coords
    fits = (MAX_BATCH_BYTES - 16 * 16) // token
    data = {"output": {"dtype": "float32"}, "packing": {"rows": 1, "seq_len": fits}}
    assert Recipe.from_dict(data).packing.seq_len == fits
    data["packing"]["seq_len"] = fits + 1
    assert problem_lines(error_of(data))[0].startswith("packing.seq_len: one batch would take 4.0 GiB")


@pytest.mark.parametrize("dtype", ["uint8", "float16", "float32"])
def test_batch_bytes_matches_the_arrays_a_batch_holds(dtype):
    recipe = Recipe.from_dict({"sizing": {"patch_size": 4, "max_tokens": 16}, "output": {"dtype": dtype},
                               "packing": {"rows": 3, "seq_len": 20, "max_images_per_row": 5}})
    tokens, slots, _ = batch_bytes(recipe)
    batch = build_batch([], [[]] * 3, seq_len=20, max_images_per_row=5, patch_dim=48, dtype=dtype)
    assert tokens + slots == sum(a.nbytes for a in batch.to_arrays().values())


def test_mask_output_counts_the_mask():
    plain = Recipe.from_dict({"drop": {"mode": "random", "rate": 0.5}})
    masked = Recipe.from_dict({"drop": {"mode": "random", "rate": 0.5, "output": "mask"}})
    assert batch_bytes(masked)[0] - batch_bytes(plain)[0] == 8 * 1024


# ----------------------------------------------------------------------------- seed


def test_seed_bounds():
    assert Recipe.from_dict({"seed": MAX_SEED}).seed == 2**63 - 1
    sample_rng(MAX_SEED, 0, "k", "s").integers(10)  # the largest seed works with the RNG rule
    assert problem_lines(error_of({"seed": 2**63})) == [
        f"seed: {2**63} is too large for any setting (seed takes 0..{MAX_SEED}; sizes and counts are far smaller)"]
    assert problem_lines(error_of({"seed": -1})) == ["seed: must be >= 0 (got -1)"]


def test_a_huge_seed_is_one_line_from_a_dict_and_from_a_file(tmp_path):
    (line,) = problem_lines(error_of({"seed": 10**5000}))
    assert line.startswith("seed: a number of about 5001 digits is too large for any setting")
    (line,) = problem_lines(file_error(tmp_path, "seed: " + "9" * 5000 + "\n"))
    assert line.startswith("seed: a number 5000 characters long is too large for any setting")
    (line,) = problem_lines(file_error(tmp_path, "packing:\n  rows: " + "9" * 30 + "\n"))
    assert line.startswith("packing.rows: 999999999999999999999999999999 is too large for any setting")


# ----------------------------------------------------------------------------- control characters

_RAW_CONTROL = re.compile("[\x00-\x09\x0b-\x1f\x7f-\x9f]")  # anything but the newline between lines


def test_control_characters_in_strings_are_refused_at_their_key():
    msg = error_of({"source": {"shards": "a\x00b.tar"}})
    assert problem_lines(msg) == [
        "source.shards: contains control character U+0000 at position 1; remove it (got 'a\\x00b.tar')"]
    assert not _RAW_CONTROL.search(msg)
    msg = error_of({"source": {"image_keys": ["jpg", "pn\x1bg"]}})
    assert problem_lines(msg)[0].startswith("source.image_keys.1: contains control character U+001B at position 2")
    msg = error_of({"source": {"sh\x07ards": "x"}})
    assert problem_lines(msg) == ["source: key 'sh\\x07ards' contains control character U+0007; remove it"]
    assert not _RAW_CONTROL.search(msg)


def test_control_characters_in_a_file_are_refused(tmp_path):
    msg = file_error(tmp_path, 'source:\n  shards: "a\\eb.tar"\n')  # YAML escape for ESC
    assert problem_lines(msg)[0].startswith("source.shards: contains control character U+001B")
    msg = file_error(tmp_path, b"source:\n  shards: a\x00b.tar\n")  # a raw NUL: not even parsable
    assert msg.endswith("not valid YAML for a recipe: line 2, column 12: control character U+0000 is not allowed "
                        "in a recipe; remove it")
    assert "\n" not in msg and not _RAW_CONTROL.search(msg)


# ----------------------------------------------------------------------------- extends


def test_extends_loads_only_recipe_files(tmp_path):
    (line,) = problem_lines(file_error(tmp_path, "extends: /proc/self/environ\n"))
    assert line == "extends: must name a recipe file ending in .yaml or .yml (got '/proc/self/environ')"
    (line,) = problem_lines(file_error(tmp_path, "extends: notes.txt\n"))
    assert line.startswith("extends: must name a recipe file ending in .yaml or .yml")
    (line,) = problem_lines(file_error(tmp_path, 'extends: "base\\0.yaml"\n'))
    assert line.startswith("extends: contains control character U+0000")


@pytest.mark.skipif(not hasattr(os, "symlink"), reason="needs symbolic links")
def test_extends_refuses_a_recipe_named_link_to_another_file(tmp_path):
    target = tmp_path / "secret.txt"
    target.write_text("seed: 1\n")
    (tmp_path / "base.yaml").symlink_to(target)
    (line,) = problem_lines(file_error(tmp_path, "extends: base.yaml\n"))
    assert line.startswith("extends: must name a recipe file ending in .yaml or .yml, a link to ")


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs named pipes")
def test_extends_refuses_pipes_and_folders_without_opening_them(tmp_path):
    os.mkfifo(tmp_path / "base.yaml")  # opening it would block: it must be refused from its stat
    msg = file_error(tmp_path, "extends: base.yaml\n")
    assert msg.endswith("cannot read recipe " + str(tmp_path / "base.yaml") + ": is not a regular file "
                        "(a device, pipe or socket)")
    (tmp_path / "dir.yaml").mkdir()
    assert file_error(tmp_path, "extends: dir.yaml\n").endswith(": is a folder")


def test_extends_refuses_an_oversized_base(tmp_path):
    with open(tmp_path / "big.yaml", "wb") as f:
        f.truncate(MAX_RECIPE_BYTES + 1)
    (line,) = problem_lines(file_error(tmp_path, "extends: big.yaml\n"))
    assert line.startswith("extends: ") and f"is {MAX_RECIPE_BYTES + 1} bytes, over the 1 MiB limit" in line


@pytest.mark.skipif(not os.path.exists("/dev/zero"), reason="needs /dev/zero")
def test_a_device_given_as_the_recipe_is_read_no_further_than_the_limit():
    with pytest.raises(RecipeError, match=r"/dev/zero: refused: more than 1048576 bytes is over the 1 MiB limit"):
        Recipe.from_file("/dev/zero")


# ----------------------------------------------------------------------------- patchloom recipe check


@pytest.mark.parametrize(
    ("text", "key"),
    [
        ("output: {dtype: float16, std: [1.0e-30, 1, 1]}\n", "output.std"),
        ("sizing: {patch_size: true}\n", "sizing.patch_size"),
        ("packing: {seq_len: 100000000000}\n", "packing.seq_len"),
        ("seed: " + "9" * 5000 + "\n", "seed"),
        ('source: {shards: "a\\x1bb.tar"}\n', "source.shards"),
        ("extends: /proc/self/environ\n", "extends"),
        ("decode: {memory_limit: 0}\n", "decode.memory_limit"),
    ],
)
def test_recipe_check_prints_one_line_and_fails(tmp_path, capsys, text, key):
    p = tmp_path / "bad.yaml"
    p.write_text(text)
    assert main(["recipe", "check", str(p)]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"patchloom: error: {p}: invalid recipe\n")
    lines = problem_lines(err)
    assert len(lines) == 1 and lines[0].startswith(f"{key}: "), err
    assert "Traceback" not in err and not _RAW_CONTROL.search(err)
