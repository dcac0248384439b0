"""surfaces.photo: decoding, EXIF orientation, bit depths, colour modes, bad files."""

from __future__ import annotations

import hashlib
import struct
import zlib

import cv2
import numpy as np
import pytest
from PIL import Image

from surfaces.model import PhotoError, SurfacesError
from surfaces.photo import MIN_SIDE_PX, load_photo

H, W = 240, 320  # non-square, so a wrong rotation changes the shape

# Quadrant colours of the display image (what the viewer must see).
TL, TR, BL, BR = (220, 30, 30), (30, 200, 40), (30, 40, 210), (250, 250, 250)


def display_pattern() -> np.ndarray:
    img = np.zeros((H, W, 3), np.uint8)
    img[: H // 2, : W // 2] = TL
    img[: H // 2, W // 2 :] = TR
    img[H // 2 :, : W // 2] = BL
    img[H // 2 :, W // 2 :] = BR
    return img


# Stored pixels for each EXIF orientation value, from the definitions in
# EXIF 2.3 (JEITA CP-3451C) tag 0x0112: value v says where the stored 0th
# row / 0th column lie in the visual image.  Written out here with numpy so
# that the check does not rest on Pillow's own exif_transpose.
STORED = {
    1: lambda d: d,
    2: lambda d: d[:, ::-1],  # 0th row top, 0th column right: mirrored
    3: lambda d: d[::-1, ::-1],  # bottom / right: turned 180 deg
    4: lambda d: d[::-1],  # bottom / left: flipped top-bottom
    5: lambda d: np.swapaxes(d, 0, 1),  # 0th row = visual left side, 0th column = top
    6: lambda d: np.rot90(d, 1),  # 0th row = visual right side, 0th column = top
    7: lambda d: np.swapaxes(np.rot90(d, 2), 0, 1),  # 0th row = right side, 0th column = bottom
    8: lambda d: np.rot90(d, -1),  # 0th row = visual left side, 0th column = bottom
}


def _quadrant_means(rgb: np.ndarray) -> list[np.ndarray]:
    h, w = rgb.shape[:2]
    q = lambda r, c: rgb[r * h // 2 + h // 8 : (r + 1) * h // 2 - h // 8, c * w // 2 + w // 8 : (c + 1) * w // 2 - w // 8]
    return [q(0, 0).reshape(-1, 3).mean(0), q(0, 1).reshape(-1, 3).mean(0), q(1, 0).reshape(-1, 3).mean(0), q(1, 1).reshape(-1, 3).mean(0)]


@pytest.mark.parametrize("fmt", ["JPEG", "PNG", "TIFF"])
@pytest.mark.parametrize("value", range(1, 9))
def test_exif_orientation_all_eight_values(tmp_path, value, fmt):
    stored = np.ascontiguousarray(STORED[value](display_pattern()))
    exif = Image.Exif()
    exif[0x0112] = value
    path = tmp_path / f"o{value}.{fmt.lower()}"
    kw = {"quality": 95} if fmt == "JPEG" else {}
    Image.fromarray(stored).save(path, format=fmt, exif=exif.tobytes(), **kw)

    photo = load_photo(path)
    assert photo.exif_orientation == value
    assert photo.rgb.shape == (H, W, 3)  # visual orientation: landscape again
    for got, want in zip(_quadrant_means(photo.rgb), (TL, TR, BL, BR)):
        assert np.abs(got - np.array(want)).max() < 8  # JPEG error on flat colour blocks


def test_sha256_matches_hashlib_for_path_and_bytes(tmp_path):
    path = tmp_path / "a.png"
    Image.fromarray(display_pattern()).save(path)
    data = path.read_bytes()
    want = hashlib.sha256(data).hexdigest()  # reference: Python's hashlib
    assert load_photo(path).sha256 == want
    from_bytes = load_photo(data)
    assert from_bytes.sha256 == want
    assert from_bytes.name == "photo"
    assert load_photo(data, name="upload.png").name == "upload.png"
    assert load_photo(path).name == "a.png"


def test_gray_is_opencv_rgb2gray_and_arrays_are_read_only(tmp_path):
    rng = np.random.default_rng(3)
    rgb = rng.integers(0, 256, (300, 400, 3), dtype=np.uint8)
    path = tmp_path / "n.png"
    Image.fromarray(rgb).save(path)
    photo = load_photo(path)
    np.testing.assert_array_equal(photo.rgb, rgb)
    np.testing.assert_array_equal(photo.gray, cv2.cvtColor(rgb, cv2.COLOR_RGB2GRAY))  # reference: OpenCV
    assert (photo.width, photo.height) == (400, 300)
    assert not photo.rgb.flags.writeable and not photo.gray.flags.writeable
    assert photo.source_format == "PNG" and photo.source_mode == "RGB" and photo.exif_orientation == 1


def _gradient16(h=256, w=300, top=65535) -> np.ndarray:
    return np.linspace(0, top, h * w).reshape(h, w).round().astype(np.uint16)


@pytest.mark.parametrize("ext", ["png", "tif"])
def test_16bit_grey_divided_by_257(tmp_path, ext):
    g = _gradient16()
    path = tmp_path / f"g16.{ext}"
    cv2.imwrite(str(path), g)  # OpenCV writes a true 16-bit grey file
    photo = load_photo(path)
    assert photo.source_mode.startswith("I;16")
    want = np.floor(g / 257.0 + 0.5)  # full 16-bit range mapped to 0..255 (65535 / 257 = 255)
    assert np.abs(photo.gray.astype(float) - want).max() <= 1
    assert photo.gray.max() == 255 and photo.gray.min() == 0
    assert any("257" in n for n in photo.notes)


def test_12bit_data_in_16bit_file_uses_its_own_range(tmp_path):
    g = _gradient16(top=4095)
    path = tmp_path / "g12.png"
    cv2.imwrite(str(path), g)
    photo = load_photo(path)
    want = np.floor(g / (4095 / 255) + 0.5)  # 12-bit full scale -> 255
    assert np.abs(photo.gray.astype(float) - want).max() <= 1
    assert any("12 bits" in n for n in photo.notes)


@pytest.mark.parametrize("ext", ["png", "tif"])
def test_16bit_colour_keeps_channels_and_order(tmp_path, ext):
    h, w = 220, 260
    rgb16 = np.zeros((h, w, 3), np.uint16)
    rgb16[..., 0] = 65535  # red full
    rgb16[..., 1] = np.linspace(0, 65535, w).round().astype(np.uint16)[None, :]
    rgb16[..., 2] = 257 * 100
    path = tmp_path / f"c16.{ext}"
    cv2.imwrite(str(path), rgb16[..., ::-1])  # OpenCV stores BGR
    photo = load_photo(path)
    assert photo.source_mode == "RGB;16"
    assert np.all(photo.rgb[..., 0] == 255)
    assert np.all(photo.rgb[..., 2] == 100)
    assert np.abs(photo.rgb[..., 1].astype(float) - np.floor(rgb16[..., 1] / 257 + 0.5)).max() <= 1


def test_rgba_composited_on_white(tmp_path):
    h, w = 210, 300
    rgba = np.zeros((h, w, 4), np.uint8)
    rgba[..., 0] = 200
    rgba[..., 1] = 20
    rgba[..., 2] = 60
    rgba[:, :100, 3] = 0  # transparent -> white paper
    rgba[:, 100:200, 3] = 128
    rgba[:, 200:, 3] = 255
    path = tmp_path / "a.png"
    Image.fromarray(rgba, "RGBA").save(path)
    photo = load_photo(path)
    assert np.all(photo.rgb[:, :100] == 255)
    a = 128 / 255
    want = np.array([200, 20, 60]) * a + 255 * (1 - a)  # "over" compositing on white
    assert np.abs(photo.rgb[:, 150].astype(float) - want).max() <= 1.0
    assert np.all(photo.rgb[:, 250] == (200, 20, 60))
    assert any("white" in n for n in photo.notes)


def test_palette_with_transparency_and_grey_and_bilevel(tmp_path):
    p = Image.new("P", (250, 250), 0)
    p.putpalette([0, 0, 0, 10, 200, 30] + [0] * 762)
    p.paste(1, (0, 0, 125, 250))
    p.info["transparency"] = 0
    p.save(tmp_path / "p.png", transparency=0)
    photo = load_photo(tmp_path / "p.png")
    assert np.all(photo.rgb[:, :125] == (10, 200, 30))
    assert np.all(photo.rgb[:, 125:] == 255)  # transparent index on white

    g = (np.arange(250 * 250).reshape(250, 250) % 256).astype(np.uint8)
    Image.fromarray(g, "L").save(tmp_path / "g.png")
    photo = load_photo(tmp_path / "g.png")
    np.testing.assert_array_equal(photo.gray, g)
    assert np.all(photo.rgb[..., 0] == photo.rgb[..., 2])

    Image.fromarray(g > 127).save(tmp_path / "b.png")  # mode "1"
    photo = load_photo(tmp_path / "b.png")
    assert set(np.unique(photo.gray)) == {0, 255}


def test_cmyk_jpeg(tmp_path):
    img = Image.new("CMYK", (300, 240), (0, 0, 0, 0))
    img.paste((255, 0, 0, 0), (0, 0, 150, 240))  # pure cyan ink
    img.paste((0, 0, 0, 255), (150, 0, 300, 240))  # pure black ink
    path = tmp_path / "cmyk.jpg"
    img.save(path, quality=95)
    photo = load_photo(path)
    assert photo.source_mode == "CMYK"
    # subtractive primaries (common practice): cyan ink -> (0, 255, 255), black ink -> (0, 0, 0)
    assert np.abs(photo.rgb[120, 60].astype(int) - (0, 255, 255)).max() < 12
    assert np.abs(photo.rgb[120, 240].astype(int) - (0, 0, 0)).max() < 12
    assert any("CMYK" in n for n in photo.notes)


def test_multi_picture_jpeg_uses_first_picture(tmp_path):
    a = Image.fromarray(display_pattern())
    b = Image.new("RGB", (W, H), (0, 0, 0))
    path = tmp_path / "m.mpo"
    a.save(path, format="MPO", save_all=True, append_images=[b], quality=95)
    photo = load_photo(path)
    assert photo.source_format == "MPO"
    assert np.abs(_quadrant_means(photo.rgb)[0] - np.array(TL)).max() < 8
    assert any("first of 2" in n for n in photo.notes)


# --------------------------------------------------------------------------- bad files


def _assert_one_line(err: PhotoError, *words: str) -> None:
    msg = str(err)
    assert "\n" not in msg
    for w in words:
        assert w.lower() in msg.lower(), msg


def _png_chunk(kind: bytes, data: bytes) -> bytes:
    # PNG chunk layout and CRC-32 over type + data: PNG specification (ISO/IEC 15948), section 5.3
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


@pytest.fixture
def good_jpeg(tmp_path):
    rng = np.random.default_rng(0)
    path = tmp_path / "good.jpg"
    Image.fromarray(rng.integers(0, 256, (600, 800, 3), dtype=np.uint8)).save(path, quality=90)
    return path


def test_empty_file(tmp_path):
    (tmp_path / "e.jpg").write_bytes(b"")
    with pytest.raises(PhotoError) as ei:
        load_photo(tmp_path / "e.jpg")
    _assert_one_line(ei.value, "e.jpg", "empty")


def test_text_named_jpg(tmp_path):
    (tmp_path / "notes.jpg").write_text("coupon 12, welder B\n")
    with pytest.raises(PhotoError) as ei:
        load_photo(tmp_path / "notes.jpg")
    _assert_one_line(ei.value, "notes.jpg", "not a readable image")


def test_truncated_jpeg(tmp_path, good_jpeg):
    data = good_jpeg.read_bytes()
    (tmp_path / "cut.jpg").write_bytes(data[: len(data) // 2])
    with pytest.raises(PhotoError) as ei:
        load_photo(tmp_path / "cut.jpg")
    _assert_one_line(ei.value, "cut.jpg", "truncated")


def test_truncated_and_corrupt_png(tmp_path):
    g = (np.arange(400 * 400).reshape(400, 400) % 251).astype(np.uint8)  # compressible: a real deflate stream
    path = tmp_path / "ok.png"
    Image.fromarray(g).save(path)
    data = path.read_bytes()
    (tmp_path / "cut.png").write_bytes(data[: len(data) * 2 // 3])
    with pytest.raises(PhotoError) as ei:
        load_photo(tmp_path / "cut.png")
    _assert_one_line(ei.value, "cut.png", "truncated")
    bad = bytearray(data)
    bad[len(bad) // 2] ^= 0x55  # inside the pixel data: the chunk CRC no longer matches
    (tmp_path / "bad.png").write_bytes(bytes(bad))
    with pytest.raises(PhotoError) as ei:
        load_photo(tmp_path / "bad.png")
    _assert_one_line(ei.value, "bad.png", "damaged")


def test_tiny_image(tmp_path):
    Image.new("RGB", (1, 1)).save(tmp_path / "dot.png")
    with pytest.raises(PhotoError) as ei:
        load_photo(tmp_path / "dot.png")
    _assert_one_line(ei.value, "dot.png", "too small", "1 x 1")
    Image.new("RGB", (MIN_SIDE_PX, MIN_SIDE_PX - 1)).save(tmp_path / "thin.png")
    with pytest.raises(PhotoError):
        load_photo(tmp_path / "thin.png")
    Image.new("RGB", (MIN_SIDE_PX, MIN_SIDE_PX)).save(tmp_path / "edge.png")
    assert load_photo(tmp_path / "edge.png").width == MIN_SIDE_PX


def test_absurd_header_refused_before_decoding(tmp_path):
    ihdr = struct.pack(">IIBBBBB", 100_000, 100_000, 8, 0, 0, 0, 0)  # claims 10^10 grey pixels
    png = b"\x89PNG\r\n\x1a\n" + _png_chunk(b"IHDR", ihdr) + _png_chunk(b"IDAT", zlib.compress(b"\0" * 64)) + _png_chunk(b"IEND", b"")
    (tmp_path / "bomb.png").write_bytes(png)
    with pytest.raises(PhotoError) as ei:
        load_photo(tmp_path / "bomb.png")
    _assert_one_line(ei.value, "bomb.png", "pixels")
    ihdr = struct.pack(">IIBBBBB", 9000, 8000, 8, 0, 0, 0, 0)  # 72 MP: over the default 60 MP limit
    png = b"\x89PNG\r\n\x1a\n" + _png_chunk(b"IHDR", ihdr) + _png_chunk(b"IDAT", zlib.compress(b"\0" * 64)) + _png_chunk(b"IEND", b"")
    (tmp_path / "big.png").write_bytes(png)
    with pytest.raises(PhotoError) as ei:
        load_photo(tmp_path / "big.png")
    _assert_one_line(ei.value, "big.png", "9000 x 8000", "limit")


def test_max_pixels_option(good_jpeg):
    with pytest.raises(PhotoError) as ei:
        load_photo(good_jpeg, max_pixels=100_000)
    _assert_one_line(ei.value, "good.jpg", "800 x 600", "limit")
    assert load_photo(good_jpeg, max_pixels=480_000).width == 800


def test_animated_gif_refused(tmp_path):
    rng = np.random.default_rng(1)
    frames = [Image.fromarray(rng.integers(0, 256, (300, 300), dtype=np.uint8)) for _ in range(3)]
    frames[0].save(tmp_path / "anim.gif", save_all=True, append_images=frames[1:])
    with pytest.raises(PhotoError) as ei:
        load_photo(tmp_path / "anim.gif")
    _assert_one_line(ei.value, "anim.gif", "3 frames")


def test_directory_and_missing_file(tmp_path):
    with pytest.raises(PhotoError) as ei:
        load_photo(tmp_path)
    _assert_one_line(ei.value, "folder")
    with pytest.raises(PhotoError) as ei:
        load_photo(tmp_path / "nope.jpg")
    _assert_one_line(ei.value, "nope.jpg", "not found")


def test_heic_gets_a_how_to(tmp_path):
    # ISO base media file: 'ftyp' box with major brand 'heic' (ISO/IEC 23008-12)
    data = struct.pack(">I", 24) + b"ftypheic" + b"\0\0\0\0" + b"mif1heic" + b"\0" * 64
    with pytest.raises(PhotoError) as ei:
        load_photo(data, name="IMG_0001.HEIC")
    _assert_one_line(ei.value, "IMG_0001.HEIC", "HEIC", "JPEG")


def test_photo_error_is_a_surfaces_error(tmp_path):
    with pytest.raises(SurfacesError):
        load_photo(tmp_path / "missing.png")
    with pytest.raises(PhotoError):
        load_photo(12345)  # type: ignore[arg-type]


@pytest.mark.parametrize("value", range(1, 9))
def test_exif_orientation_on_16bit_colour_png(tmp_path, value):
    # 16-bit colour is decoded by OpenCV and turned by our own table: same EXIF 2.3 semantics as above
    stored = np.ascontiguousarray(STORED[value](display_pattern())).astype(np.uint16) * 257
    ok, buf = cv2.imencode(".png", stored[..., ::-1])
    data = buf.tobytes()
    exif = Image.Exif()
    exif[0x0112] = value
    raw = exif.tobytes()
    raw = raw[6:] if raw.startswith(b"Exif\x00\x00") else raw
    # eXIf chunk placed right after IHDR (8-byte signature + 25-byte IHDR chunk): PNG 1.5 extension
    data = data[:33] + _png_chunk(b"eXIf", raw) + data[33:]
    photo = load_photo(data, name=f"o{value}.png")
    assert photo.source_mode == "RGB;16" and photo.exif_orientation == value
    assert photo.rgb.shape == (H, W, 3)
    for got, want in zip(_quadrant_means(photo.rgb), (TL, TR, BL, BR)):
        assert np.abs(got - np.array(want)).max() < 1.0


@pytest.mark.parametrize("fmt", ["WEBP", "BMP"])
def test_other_formats(tmp_path, fmt):
    path = tmp_path / f"p.{fmt.lower()}"
    Image.fromarray(display_pattern()).save(path, format=fmt, **({"lossless": True} if fmt == "WEBP" else {}))
    photo = load_photo(path)
    assert photo.source_format == fmt
    np.testing.assert_array_equal(photo.rgb, display_pattern())


def test_float_and_32bit_integer_tiff(tmp_path):
    f = np.linspace(0, 1, 300 * 400, dtype=np.float32).reshape(300, 400)
    Image.fromarray(f, "F").save(tmp_path / "f.tif")
    photo = load_photo(tmp_path / "f.tif")
    assert photo.source_mode == "F"
    assert np.abs(photo.gray.astype(float) - np.floor(f * 255 + 0.5)).max() <= 1  # 0..1 -> 0..255
    i = (np.arange(300 * 400).reshape(300, 400) * 10).astype(np.int32)  # needs 21 bits
    Image.fromarray(i, "I").save(tmp_path / "i.tif")
    photo = load_photo(tmp_path / "i.tif")
    want = np.floor(i / ((2**21 - 1) / 255) + 0.5)  # scaled from the smallest bit depth holding the data
    assert np.abs(photo.gray.astype(float) - want).max() <= 1


def test_invalid_orientation_value_is_ignored_with_a_note(tmp_path):
    exif = Image.Exif()
    exif[0x0112] = 9  # EXIF 2.3 defines 1..8 only
    Image.fromarray(display_pattern()).save(tmp_path / "o9.jpg", exif=exif.tobytes(), quality=95)
    photo = load_photo(tmp_path / "o9.jpg")
    assert photo.exif_orientation == 1 and photo.rgb.shape == (H, W, 3)
    assert any("orientation 9" in n for n in photo.notes)


def test_oversized_file_refused_before_reading(tmp_path, monkeypatch):
    import surfaces.photo as photo_module

    path = tmp_path / "huge.tif"
    Image.fromarray(display_pattern()).save(path)
    monkeypatch.setattr(photo_module, "MAX_FILE_BYTES", 1000)  # a small limit stands in for 500 MB
    with pytest.raises(PhotoError) as ei:
        load_photo(path)
    _assert_one_line(ei.value, "huge.tif", "MB")


@pytest.mark.parametrize("subsampling", [0, 2])
def test_rgb_jpeg_pixels_are_pillows(tmp_path, subsampling):
    # reference: Pillow's own decode of the same file (the plain-JPEG path decodes with OpenCV)
    from skimage import data as skdata

    path = tmp_path / "astronaut.jpg"
    Image.fromarray(skdata.astronaut()).save(path, quality=90, subsampling=subsampling)
    ref = np.asarray(Image.open(path).convert("RGB")).astype(int)
    got = load_photo(path).rgb.astype(int)
    assert got.shape == ref.shape
    assert np.abs(got - ref).max() <= 1


def test_jpeg_cut_anywhere_is_refused(tmp_path, good_jpeg):
    # a copy cut short at any byte (the usual failed transfer) must be refused, not filled with grey
    data = good_jpeg.read_bytes()
    rng = np.random.default_rng(5)
    for k, at in enumerate(sorted(rng.integers(len(data) // 10, len(data) - 3, size=12))):
        (tmp_path / f"cut{k}.jpg").write_bytes(data[:at])
        with pytest.raises(PhotoError) as ei:
            load_photo(tmp_path / f"cut{k}.jpg")
        _assert_one_line(ei.value, f"cut{k}.jpg", "truncated")
