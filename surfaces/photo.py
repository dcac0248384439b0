"""Load a photo file (or its bytes) into a :class:`~surfaces.model.Photo`.

What :func:`load_photo` does, in order:

1. reads the file bytes once and hashes them (SHA-256 of exactly those bytes);
2. reads the header only and refuses, before any pixel is decoded, files that
   are empty, not an image, animated / multi-page, too large
   (``max_pixels``) or too small to measure (under ``MIN_SIDE_PX`` on a side);
3. decodes every pixel (a truncated or damaged file is an error, never a
   partly grey picture);
4. applies the EXIF orientation (the value applied is kept in the result);
5. converts to 8-bit RGB and computes the grey image with OpenCV's
   ``RGB2GRAY`` (ITU-R BT.601 luma weights).

Conversions
-----------
* grey, palette, bilevel: expanded to RGB;
* alpha (RGBA, LA, palette with transparency): composited on white, as the
  picture would look printed on paper;
* CMYK: converted through the embedded ICC profile when there is one, else
  with Pillow's plain CMYK -> RGB formula (a note says which);
* 16-bit (grey ``I;16*``, 32-bit integer ``I``, 16-bit RGB/RGBA): the full
  16-bit range is mapped to 0..255 by dividing by 257 (65535 -> 255), which
  keeps the photometry of a full-range file.  When the data uses 12 bits or
  fewer (maximum below 4096, as in many scientific and machine-vision
  cameras), dividing by 257 would leave a nearly black picture, so the data
  is scaled from the smallest bit depth (>= 8) that holds its maximum
  instead.  Either way a note in ``Photo.notes`` records the divisor.
  16-bit colour is decoded with OpenCV (Pillow would keep only the high byte).

The returned arrays are read-only: later stages must copy before editing.
"""

from __future__ import annotations

import hashlib
import io
import math
import warnings
from pathlib import Path

import cv2
import numpy as np
from PIL import Image, ImageFile, ImageOps, UnidentifiedImageError

from .model import Photo, PhotoError

__all__ = ["load_photo", "MIN_SIDE_PX", "DEFAULT_MAX_PIXELS", "MAX_FILE_BYTES"]

#: Smaller photos cannot hold a marker and a face at a measurable scale.
MIN_SIDE_PX: int = 200
#: Default pixel-count limit (a 60 MP photo is already larger than phones take).
DEFAULT_MAX_PIXELS: int = 60_000_000
#: Files larger than this are refused before they are read into memory.
MAX_FILE_BYTES: int = 500_000_000

_EXIF_ORIENTATION_TAG = 0x0112  # EXIF 2.3 / TIFF 6.0 tag 274 "Orientation"
_RETAKE = "export it again as JPEG or PNG"

# Orientation value -> numpy operation on an (H, W[, C]) array; the same
# transposes as PIL.ImageOps.exif_transpose (checked by the tests).
_NP_ORIENT = {
    2: lambda a: a[:, ::-1],
    3: lambda a: a[::-1, ::-1],
    4: lambda a: a[::-1],
    5: lambda a: np.swapaxes(a, 0, 1),
    6: lambda a: np.rot90(a, -1),
    7: lambda a: np.swapaxes(a[::-1, ::-1], 0, 1),
    8: lambda a: np.rot90(a, 1),
}


def load_photo(
    source: str | Path | bytes,
    *,
    name: str | None = None,
    max_pixels: int = DEFAULT_MAX_PIXELS,
) -> Photo:
    """Read and decode a photo, apply its EXIF orientation, convert to 8-bit RGB.

    Parameters
    ----------
    source : str, Path or bytes
        A file path or the file's bytes (e.g. an upload).
    name : str, optional
        Name used in messages and records; default the file name (or
        ``"photo"`` for bytes).
    max_pixels : int
        Refuse images with more pixels than this (checked from the header,
        before decoding).

    Returns
    -------
    Photo
        ``rgb`` (H, W, 3) uint8 and ``gray`` (H, W) uint8, both read-only,
        in the orientation the camera was held.

    Raises
    ------
    PhotoError
        One line naming the file, the problem and what to do.
    """
    data, name = _read_source(source, name)
    label = f"photo '{name}'"
    if len(data) == 0:
        raise PhotoError(f"{label} is empty (0 bytes): copy the file from the camera again")
    digest = hashlib.sha256(data).hexdigest()
    _refuse_known_unsupported(data, label)

    notes: list[str] = []
    img = _open(data, label, max_pixels)
    try:
        fmt = img.format or "unknown"
        frames = int(getattr(img, "n_frames", 1) or 1)
        if frames > 1:
            if fmt == "MPO":
                # Phone JPEGs with an embedded preview / depth picture.
                notes.append(f"multi-picture JPEG: used the first of {frames} pictures")
            else:
                raise PhotoError(
                    f"{label} has {frames} frames (animated or multi-page {fmt}): "
                    "save the one picture to measure as a single JPEG or PNG"
                )
        w, h = img.size
        _check_size(w, h, label, max_pixels)
        rawmode = _rawmode(img)  # before load(), which clears the tile list
        source_mode = img.mode
        is16_colour = img.mode in ("RGB", "RGBA") and rawmode is not None and ";16" in rawmode
        if is16_colour:
            source_mode = rawmode.split(";")[0] + ";16"
        if fmt == "PNG":
            _verify_png(data, label)
        fast = _fast_jpeg(img, data)
        if fast is not None:
            orientation = _orientation(img)
            op = _NP_ORIENT.get(orientation)
            rgb = fast if op is None else op(fast)
        else:
            orientation, pending = _decode_all(img, label)
            if is16_colour:
                rgb = _decode_16bit_colour(data, label, orientation, notes)
            else:
                if pending != 1:
                    img = ImageOps.exif_transpose(img)
                rgb = _to_rgb8(img, label, notes)
    finally:
        img.close()

    if orientation not in range(1, 9):
        notes.append(f"EXIF orientation {orientation} is not a valid value: ignored")
        orientation = 1
    rgb = np.ascontiguousarray(rgb)
    gray = cv2.cvtColor(rgb, cv2.COLOR_RGB2GRAY)
    rgb.flags.writeable = False
    gray.flags.writeable = False
    return Photo(
        rgb=rgb,
        gray=gray,
        name=name,
        sha256=digest,
        source_format=fmt,
        source_mode=source_mode,
        exif_orientation=int(orientation),
        notes=tuple(notes),
    )


# --------------------------------------------------------------------------- reading


def _read_source(source: str | Path | bytes, name: str | None) -> tuple[bytes, str]:
    if isinstance(source, (bytes, bytearray, memoryview)):
        return bytes(source), name or "photo"
    if not isinstance(source, (str, Path)):
        raise PhotoError(
            f"photo source of type {type(source).__name__} is not supported: "
            "give a file path or the file's bytes"
        )
    path = Path(source)
    label = f"photo '{name or path.name or str(path)}'"
    if path.is_dir():
        raise PhotoError(f"{label} is a folder, not a file: give the path of one photo file")
    try:
        size = path.stat().st_size
        if size > MAX_FILE_BYTES:
            raise PhotoError(
                f"{label} is {size / 1e6:.0f} MB, larger than any photo file should be "
                f"({MAX_FILE_BYTES / 1e6:.0f} MB): use the camera's JPEG or a resized copy"
            )
        data = path.read_bytes()
    except FileNotFoundError:
        raise PhotoError(f"{label} not found at {str(path)!r}: check the path and file name") from None
    except PermissionError:
        raise PhotoError(f"{label} cannot be read (permission denied): copy it somewhere readable") from None
    except OSError as err:
        raise PhotoError(f"{label} cannot be read ({err.strerror or err}): check the file") from None
    return data, name or path.name


def _refuse_known_unsupported(data: bytes, label: str) -> None:
    """Formats Pillow does not read but phones produce: say how to get a JPEG."""
    if data[4:8] == b"ftyp" and data[8:12] in (b"heic", b"heix", b"hevc", b"heim", b"heis", b"mif1", b"msf1", b"avif"):
        raise PhotoError(
            f"{label} is a HEIF/HEIC/AVIF picture, which is not supported: "
            "set the camera to JPEG ('most compatible') or export the photo as JPEG"
        )


def _open(data: bytes, label: str, max_pixels: int) -> Image.Image:
    try:
        with warnings.catch_warnings():
            # Our own max_pixels check below replaces Pillow's warning.
            warnings.simplefilter("ignore", Image.DecompressionBombWarning)
            return Image.open(io.BytesIO(data))
    except Image.DecompressionBombError:
        raise PhotoError(
            f"{label} claims far too many pixels (over {max_pixels:,}): "
            "it is damaged or not a photo; use the camera's original file"
        ) from None
    except UnidentifiedImageError:
        raise PhotoError(
            f"{label} is not a readable image (JPEG, PNG, TIFF, WebP or BMP expected): "
            f"check that it is a photo, or {_RETAKE}"
        ) from None
    except (OSError, SyntaxError, ValueError, EOFError) as err:
        raise PhotoError(f"{label} is damaged ({_short(err)}): {_RETAKE}") from None


def _check_size(w: int, h: int, label: str, max_pixels: int) -> None:
    if w * h > max_pixels:
        raise PhotoError(
            f"{label} is {w} x {h} px ({w * h / 1e6:.0f} MP), over the limit of "
            f"{max_pixels / 1e6:g} MP: resize it (long side about 4000 px is plenty)"
        )
    if min(w, h) < MIN_SIDE_PX:
        raise PhotoError(
            f"{label} is only {w} x {h} px, too small to measure "
            f"(at least {MIN_SIDE_PX} px on each side): use the camera's full-size photo"
        )


def _orientation(img: Image.Image) -> int:
    try:
        value = img.getexif().get(_EXIF_ORIENTATION_TAG, 1)
        return int(value)
    except Exception:  # noqa: BLE001 - a broken EXIF block must not stop the load
        return 1


def _rawmode(img: Image.Image) -> str | None:
    tile = getattr(img, "tile", None) or []
    if not tile:
        return None
    args = tile[0].args if hasattr(tile[0], "args") else tile[0][3]
    if isinstance(args, str):
        return args
    if isinstance(args, tuple) and args and isinstance(args[0], str):
        return args[0]
    return None


def _decode_all(img: Image.Image, label: str) -> tuple[int, int]:
    """Decode every pixel; return (EXIF orientation of the file, orientation still to apply).

    Pillow's TIFF reader already turns the picture while loading (and drops
    the tag); other formats still need ``exif_transpose`` afterwards.
    """
    old = ImageFile.LOAD_TRUNCATED_IMAGES
    ImageFile.LOAD_TRUNCATED_IMAGES = False  # a cut file must fail, not fill with grey
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", Image.DecompressionBombWarning)
            recorded = _orientation(img)
            img.load()
            pending = _orientation(img) if img.format == "TIFF" else recorded
            return recorded, pending
    except (OSError, SyntaxError, ValueError, EOFError, MemoryError) as err:
        raise PhotoError(
            f"{label} is truncated or damaged ({_short(err)}): copy it from the camera again or {_RETAKE}"
        ) from None
    finally:
        ImageFile.LOAD_TRUNCATED_IMAGES = old


def _fast_jpeg(img: Image.Image, data: bytes) -> np.ndarray | None:
    """Decode a plain, complete 8-bit RGB JPEG with OpenCV (about twice Pillow's speed
    with its array copy); ``None`` for anything else, which takes Pillow's checked path.

    Complete means the stream ends with the end-of-image marker: OpenCV fills a
    cut file with grey instead of failing, so a cut file must go to Pillow, which
    refuses it.  (A file cut short and then given an end marker by some other
    tool would pass here with grey rows; a plain cut at any byte does not.)
    The EXIF orientation is left to the caller.
    """
    if img.format != "JPEG" or img.mode != "RGB" or data.rstrip(b"\x00")[-2:] != b"\xff\xd9":
        return None
    arr = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_COLOR_RGB | cv2.IMREAD_IGNORE_ORIENTATION)
    if arr is None or arr.shape[:2] != (img.size[1], img.size[0]) or arr.ndim != 3:
        return None
    return arr


def _verify_png(data: bytes, label: str) -> None:
    """Check every PNG chunk checksum (Pillow's load() skips those of the pixel data)."""
    try:
        with Image.open(io.BytesIO(data)) as probe:
            probe.verify()
    except Exception as err:  # noqa: BLE001 - any failure here means a damaged file
        raise PhotoError(
            f"{label} is truncated or damaged ({_short(err)}): copy it from the camera again or {_RETAKE}"
        ) from None


def _short(err: BaseException) -> str:
    text = " ".join(str(err).split()) or type(err).__name__
    return text[:120]


# --------------------------------------------------------------------------- conversion


def _to_rgb8(img: Image.Image, label: str, notes: list[str]) -> np.ndarray:
    mode = img.mode
    if mode in ("I;16", "I;16L", "I;16B", "I;16N", "I", "F"):
        grey = _scale_to_8bit(np.asarray(img), notes, mode)
        return cv2.cvtColor(grey, cv2.COLOR_GRAY2RGB)
    if mode == "CMYK":
        return np.asarray(_cmyk_to_rgb(img, notes))
    has_alpha = mode in ("RGBA", "LA", "PA", "La", "RGBa") or (
        mode in ("P", "L", "RGB") and "transparency" in img.info
    )
    if has_alpha:
        rgba = img.convert("RGBA")
        alpha = np.asarray(rgba.getchannel("A"))
        if alpha.min() < 255:
            notes.append("transparent areas composited on white")
        white = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
        return np.asarray(Image.alpha_composite(white, rgba).convert("RGB"))
    if mode == "RGB":
        return np.asarray(img)
    try:
        return np.asarray(img.convert("RGB"))
    except (ValueError, OSError):
        raise PhotoError(
            f"{label} uses the colour mode {mode!r}, which cannot be converted: save it as 8-bit RGB JPEG or PNG"
        ) from None


def _cmyk_to_rgb(img: Image.Image, notes: list[str]) -> Image.Image:
    icc = img.info.get("icc_profile")
    if icc:
        try:
            from PIL import ImageCms

            src = ImageCms.ImageCmsProfile(io.BytesIO(icc))
            dst = ImageCms.createProfile("sRGB")
            out = ImageCms.profileToProfile(img, src, dst, outputMode="RGB")
            if out is not None:
                notes.append("CMYK converted to sRGB through the embedded colour profile")
                return out
        except Exception:  # noqa: BLE001 - fall back to the plain formula
            pass
    notes.append("CMYK converted to RGB without a colour profile (colours approximate)")
    return img.convert("RGB")


def _scale_to_8bit(arr: np.ndarray, notes: list[str], what: str) -> np.ndarray:
    """Map 16-bit (or wider) data to uint8; the rule is in the module docstring."""
    if arr.dtype.kind == "f":
        a = np.nan_to_num(arr.astype(np.float32), nan=0.0, posinf=0.0, neginf=0.0)
        top = float(a.max()) if a.size else 0.0
        if top <= 1.0:
            divisor = 1.0 / 255.0
            notes.append(f"{what} floating-point data taken as 0..1 and scaled to 0..255")
        else:
            divisor = (2.0 ** max(8, math.ceil(math.log2(top + 1))) - 1) / 255.0
            notes.append(f"{what} floating-point data (maximum {top:g}) divided by {divisor:.6g} to 8-bit")
        return np.clip(a / divisor + 0.5, 0, 255).astype(np.uint8)
    top = int(arr.max()) if arr.size else 0
    if int(arr.min()) < 0:
        notes.append(f"{what}: negative values clipped to 0")
    if top >= 4096:
        bits = max(16, math.ceil(math.log2(top + 1)))
    else:
        bits = max(8, math.ceil(math.log2(top + 1)))
    divisor = (2**bits - 1) / 255.0
    if bits == 16:
        notes.append(f"{what} 16-bit data divided by 257 to 8-bit")
    else:
        notes.append(
            f"{what} data uses {bits} bits (maximum {top}): divided by {divisor:.6g} to 8-bit"
        )
    if bits == 8:
        return np.clip(arr, 0, 255).astype(np.uint8)
    out = np.empty(arr.shape, np.uint8)
    # In place in float32 keeps the peak memory to one extra copy.
    tmp = arr.astype(np.float32)
    np.clip(tmp, 0, None, out=tmp)
    tmp *= 1.0 / divisor
    tmp += 0.5
    np.minimum(tmp, 255.0, out=tmp)
    out[...] = tmp
    return out


def _decode_16bit_colour(data: bytes, label: str, orientation: int, notes: list[str]) -> np.ndarray:
    buf = np.frombuffer(data, np.uint8)
    arr = cv2.imdecode(buf, cv2.IMREAD_UNCHANGED)
    if arr is None or arr.ndim != 3 or arr.dtype != np.uint16:
        raise PhotoError(f"{label}: its 16-bit colour data cannot be decoded: {_RETAKE} (8-bit)")
    op = _NP_ORIENT.get(orientation)
    if op is not None:
        arr = op(arr)
    if arr.shape[2] == 4:
        alpha = arr[..., 3].astype(np.float32) / 65535.0
        if float(alpha.min()) < 1.0:
            notes.append("transparent areas composited on white")
        colour = arr[..., 2::-1].astype(np.float32)
        colour *= alpha[..., None]
        colour += (1.0 - alpha[..., None]) * 65535.0
        arr = colour
    else:
        arr = arr[..., ::-1]
    what = "RGB"
    if arr.dtype.kind == "f":
        arr = np.rint(arr).astype(np.uint16)
    return _scale_to_8bit(arr, notes, what)
