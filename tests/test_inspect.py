"""inspect: decode, measure and size-check images, including odd-but-valid formats and broken files."""
from __future__ import annotations

import io

import numpy as np
import pyarrow as pa
import pytest
from PIL import Image

from curate.stages.base import StageContext
from curate.stages.inspect import InspectConfig, inspect_one, run, to_rgb

from conftest import jpeg_bytes

CFG = InspectConfig()


def _codes(checks, failed=True):
    return [c["code"] for c in checks if c["failed"] == failed]


def _save(img, fmt, **kw) -> bytes:
    buf = io.BytesIO()
    img.save(buf, fmt, **kw)
    return buf.getvalue()


def test_plain_jpeg_passes_and_records_metadata():
    data = jpeg_bytes((640, 480))
    cols, checks, rgb = inspect_one(data, CFG)
    assert cols["decoded"] and cols["width"] == 640 and cols["height"] == 480
    assert cols["format"] == "JPEG" and cols["frames"] == 1 and cols["has_alpha"] is False
    import hashlib

    assert cols["sha256"] == hashlib.sha256(data).hexdigest()
    assert _codes(checks) == []
    assert rgb.mode == "RGB"


def test_exif_orientation_swaps_displayed_sides():
    # EXIF 2.3 (CIPA DC-008) tag 0x0112: value 6 means the stored image is shown rotated 90 degrees.
    img = Image.new("RGB", (600, 400), (10, 200, 30))
    exif = Image.Exif()
    exif[0x0112] = 6
    cols, _, rgb = inspect_one(_save(img, "JPEG", exif=exif.tobytes(), quality=95), CFG)
    assert (cols["width"], cols["height"]) == (400, 600)
    assert rgb.size[0] < rgb.size[1]


@pytest.mark.parametrize(
    "make,fmt",
    [
        (lambda: Image.new("RGBA", (300, 300), (255, 0, 0, 0)), "PNG"),
        (lambda: Image.new("LA", (300, 300), (128, 0)), "PNG"),
        (lambda: Image.new("CMYK", (300, 300), (0, 255, 255, 0)), "JPEG"),
        (lambda: Image.new("RGB", (300, 300), (1, 2, 3)), "WEBP"),
        (lambda: Image.new("RGB", (300, 300), (1, 2, 3)), "BMP"),
        (lambda: Image.new("RGB", (300, 300), (1, 2, 3)), "TIFF"),
        (lambda: Image.new("P", (300, 300), 3), "GIF"),
    ],
)
def test_odd_but_valid_formats_decode(make, fmt):
    cols, checks, rgb = inspect_one(_save(make(), fmt), InspectConfig(min_file_bytes=0))
    assert cols["decoded"], checks
    assert rgb.mode == "RGB" and rgb.size == (300, 300)


def test_transparent_pixels_composite_on_white():
    img = Image.new("RGBA", (300, 300), (255, 0, 0, 0))
    _, _, rgb = inspect_one(_save(img, "PNG"), InspectConfig(min_file_bytes=0))
    assert rgb.getpixel((5, 5)) == (255, 255, 255)
    pal = Image.new("P", (300, 300), 0)
    pal.putpalette([0, 0, 0] * 256)
    cols, _, rgb = inspect_one(_save(pal, "PNG", transparency=0), InspectConfig(min_file_bytes=0))
    assert cols["has_alpha"] and rgb.getpixel((0, 0)) == (255, 255, 255)


def test_sixteen_bit_is_scaled_not_clipped():
    arr = np.full((300, 300), 32768, np.uint16)  # mid-grey in 16 bits
    img = Image.fromarray(arr)
    _, _, rgb = inspect_one(_save(img, "PNG"), InspectConfig(min_file_bytes=0))
    assert abs(rgb.getpixel((1, 1))[0] - 128) <= 1


def test_animated_gif_counts_frames_and_uses_the_first():
    frames = [Image.new("RGB", (300, 300), (80 * i, 0, 0)) for i in range(3)]
    data = _save(frames[0], "GIF", save_all=True, append_images=frames[1:], duration=50)
    cols, _, _ = inspect_one(data, InspectConfig(min_file_bytes=0))
    assert cols["frames"] == 3 and cols["decoded"]


@pytest.mark.parametrize(
    "data,code",
    [
        (b"", "file_empty"),
        (b"this is not an image at all" * 300, "not_image"),
        (jpeg_bytes((800, 600))[:3000], "truncated"),
        (OSError("permission denied"), "unreadable"),
    ],
)
def test_broken_inputs_get_a_reason_not_a_crash(data, code):
    cols, checks, rgb = inspect_one(data, CFG)
    assert code in _codes(checks)
    if code == "truncated":
        # A truncated JPEG decodes with the missing part filled (Pillow's LOAD_TRUNCATED_IMAGES), so
        # the quality stage can measure how much is lost; its drop code keeps it out of the shards.
        failed = {c["code"] for c in checks if c["failed"]}
        assert "truncated" in failed and rgb is not None
    else:
        assert rgb is None and cols["decoded"] is False


def test_decompression_bomb_guard_does_not_decode():
    data = _save(Image.new("L", (2000, 2000)), "PNG")
    cols, checks, rgb = inspect_one(data, InspectConfig(max_pixels=1_000_000, min_file_bytes=0))
    assert "too_many_pixels" in _codes(checks) and rgb is None


@pytest.mark.parametrize(
    "size,codes",
    [
        ((120, 90), {"short_side_small", "pixels_small"}),
        ((1600, 200), {"short_side_small", "aspect_extreme"}),
        ((1200, 280), {"aspect_extreme"}),
        ((512, 512), set()),
    ],
)
def test_size_and_aspect_checks(size, codes):
    cols, checks, _ = inspect_one(jpeg_bytes(size), InspectConfig(min_file_bytes=0))
    assert set(_codes(checks)) == codes
    # every size check is recorded, failed or not, so explain can show it
    assert {"short_side_small", "pixels_small", "aspect_extreme"} <= {c["code"] for c in checks}


def test_small_file_check_uses_laion_5kb_floor():
    # LAION-400M (Schuhmann et al. 2021) dropped images under 5 KB.
    data = _save(Image.new("RGB", (300, 300), (9, 9, 9)), "JPEG", quality=20)
    assert len(data) < 5000
    _, checks, _ = inspect_one(data, CFG)
    assert "file_small" in _codes(checks)


def test_draft_mode_keeps_true_size_and_matches_full_decode_closely():
    data = jpeg_bytes((2048, 1536), noise=False)
    cols, _, rgb = inspect_one(data, InspectConfig(draft_short_side=256))
    assert (cols["width"], cols["height"]) == (2048, 1536)
    assert min(rgb.size) >= 256 and rgb.size[0] < 2048  # decoded at a reduced DCT scale
    full = to_rgb(Image.open(io.BytesIO(data))).resize(rgb.size)
    diff = np.abs(np.asarray(full, float) - np.asarray(rgb, float)).mean()
    assert diff < 3.0


def test_stage_run_on_a_table(tmp_path):
    good = tmp_path / "a.jpg"
    good.write_bytes(jpeg_bytes((640, 480)))
    empty = tmp_path / "b.jpg"
    empty.write_bytes(b"")
    t = pa.table(
        {
            "sample_id": ["a", "b", "c"],
            "locator": [str(good), str(empty), "x"],
            "source_problem": [None, None, "unsafe_path"],
        }
    )
    from curate.config import load_config
    from curate.plan import config_sections

    cfg = load_config(None, ["hashes.enabled=false"], config_sections())
    out = run(t, CFG, StageContext(config=cfg))
    assert out.column("sample_id").to_pylist() == ["a", "b", "c"]
    assert out.column("decoded").to_pylist() == [True, False, False]
    checks = out.column("inspect.checks").to_pylist()
    assert "file_empty" in _codes(checks[1]) and "unsafe_path" in _codes(checks[2])


def test_empty_table():
    from curate.config import load_config
    from curate.plan import config_sections

    cfg = load_config(None, ["hashes.enabled=false"], config_sections())
    t = pa.table({"sample_id": pa.array([], pa.string()), "locator": pa.array([], pa.string()),
                  "source_problem": pa.array([], pa.string())})
    out = run(t, CFG, StageContext(config=cfg))
    assert out.num_rows == 0 and "inspect.checks" in out.column_names
