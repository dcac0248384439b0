"""The printable reference card: an A4 PDF with one DICT_4X4_50 marker.

Everything on the card is vector drawing, so a printer at 100 % reproduces
the sizes exactly:

* the marker, drawn module by module from OpenCV's own bit pattern
  (``cv2.aruco.generateImageMarker`` at 6 px gives the 6 x 6 module grid,
  border included), all black modules filled as one path so that no seams
  appear between neighbouring modules; its side ``marker_mm`` is the outer
  black square; a white quiet zone of ``QUIET_MODULES`` modules surrounds it
  and a light grey cut line lies one module further out;
* a 0-100 mm scale bar (a tick every mm, a number every 10 mm);
* a 50 mm check square to be measured with a rule after printing;
* the marker's size and id in figures and in words, and a short how-to.

:func:`write_card` writes the file atomically and never overwrites one
unless ``force=True``.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import cv2
import numpy as np
from fpdf import FPDF
from fpdf.enums import PathPaintRule

from .model import SurfacesError

__all__ = [
    "write_card",
    "marker_modules",
    "CHECK_SQUARE_MM",
    "CHECK_TOLERANCE_MM",
    "QUIET_MODULES",
    "MARKER_DICT",
    "MARKER_DICT_NAME",
]

MARKER_DICT = cv2.aruco.DICT_4X4_50
MARKER_DICT_NAME = "DICT_4X4_50"
#: Modules per marker side: 4 data bits plus a one-module black border each side.
MODULES = 6
#: White margin around the black square, in modules.
QUIET_MODULES = 2
#: Outer side of the check square and the tolerance the user checks it to.
CHECK_SQUARE_MM = 50.0
CHECK_TOLERANCE_MM = 0.5
CHECK_FRAME_MM = 0.8  # black frame width, inside the 50 mm outer edge

_PAGE_W, _PAGE_H = 210.0, 297.0
_MARGIN = 15.0
_MIN_MARKER_MM, _MAX_MARKER_MM = 5.0, 60.0  # larger markers would push the check square off page 1


def marker_modules(marker_id: int) -> np.ndarray:
    """(6, 6) bool array, True where OpenCV's DICT_4X4_50 marker ``marker_id`` is black.

    Row 0 is the top of the marker as printed, column 0 its left.
    """
    dictionary = cv2.aruco.getPredefinedDictionary(MARKER_DICT)
    img = cv2.aruco.generateImageMarker(dictionary, int(marker_id), MODULES)
    return np.asarray(img) < 128


def write_card(
    path: str | Path,
    *,
    marker_mm: float = 20.0,
    marker_id: int = 0,
    force: bool = False,
) -> Path:
    """Write the printable A4 reference card as a PDF.

    Parameters
    ----------
    path : str or Path
        Where to write the PDF.
    marker_mm : float
        Side of the marker's outer black square in mm (5 to 60).
    marker_id : int
        Marker id in DICT_4X4_50 (0 to 49).
    force : bool
        Overwrite an existing file.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    SurfacesError
        Bad size or id, the file exists and ``force`` is False, or the folder
        cannot be written.
    """
    path = Path(path)
    try:
        marker_mm = float(marker_mm)
    except (TypeError, ValueError):
        raise SurfacesError(f"marker size {marker_mm!r} is not a number: give the side in mm, e.g. 20") from None
    if not (_MIN_MARKER_MM <= marker_mm <= _MAX_MARKER_MM):
        raise SurfacesError(
            f"marker size {marker_mm:g} mm is outside {_MIN_MARKER_MM:g}-{_MAX_MARKER_MM:g} mm: "
            "choose a side that fits the page (20 mm suits most faces)"
        )
    if isinstance(marker_id, bool) or not isinstance(marker_id, (int, np.integer)) or not 0 <= marker_id < 50:
        raise SurfacesError(f"marker id {marker_id!r} is not in 0-49: {MARKER_DICT_NAME} has ids 0 to 49")
    if path.is_dir():
        raise SurfacesError(f"card path '{path}' is a folder: give a file name such as card.pdf")
    if path.exists() and not force:
        raise SurfacesError(f"card file '{path}' already exists: choose another name or allow overwriting (force)")
    if not path.parent.exists():
        raise SurfacesError(f"folder '{path.parent}' does not exist: create it or choose another place for the card")

    data = _build_pdf(marker_mm, int(marker_id))
    _write_atomic(path, data, force=force)
    return path


# --------------------------------------------------------------------------- drawing


def _build_pdf(marker_mm: float, marker_id: int) -> bytes:
    pdf = FPDF(orientation="P", unit="mm", format="A4")
    pdf.set_title(f"Reference card, marker {MARKER_DICT_NAME} id {marker_id}, {marker_mm:g} mm")
    pdf.set_creator("surfaces")
    pdf.set_auto_page_break(auto=True, margin=_MARGIN)
    pdf.set_margins(_MARGIN, _MARGIN, _MARGIN)
    pdf.add_page()

    pdf.set_font("Helvetica", "B", 15)
    pdf.set_xy(_MARGIN, _MARGIN)
    pdf.cell(0, 7, "Reference card for weld face photos", new_x="LMARGIN", new_y="NEXT")
    pdf.set_font("Helvetica", "", 9)
    pdf.cell(
        0, 5, "Print at 100 % and check the 50 mm square below before first use.", new_x="LMARGIN", new_y="NEXT"
    )

    module = marker_mm / MODULES
    quiet = QUIET_MODULES * module
    cut = quiet + module
    top = pdf.get_y() + 4.0
    mx, my = _MARGIN + cut, top + cut
    _draw_marker(pdf, mx, my, marker_mm, marker_id)
    pdf.set_draw_color(170, 170, 170)
    pdf.set_line_width(0.2)
    pdf.set_dash_pattern(dash=1.5, gap=1.5)
    pdf.rect(mx - cut, my - cut, marker_mm + 2 * cut, marker_mm + 2 * cut)
    pdf.set_dash_pattern()
    block_right = mx + marker_mm + cut
    block_bottom = my + marker_mm + cut

    # Marker description, beside the marker when there is room, else below.
    text_x = block_right + 6.0
    text_w = _PAGE_W - _MARGIN - text_x
    if text_w < 70.0:
        text_x, text_w = _MARGIN, _PAGE_W - 2 * _MARGIN
        pdf.set_xy(text_x, block_bottom + 3.0)
    else:
        pdf.set_xy(text_x, top)
    pdf.set_font("Helvetica", "B", 11)
    pdf.multi_cell(text_w, 5.5, f"Marker side {marker_mm:g} mm, id {marker_id}", new_x="LEFT", new_y="NEXT")
    pdf.set_font("Helvetica", "", 9)
    pdf.multi_cell(
        text_w,
        4.5,
        f"The outer black square measures {_mm_in_words(marker_mm)} on each side; "
        f"it is marker number {_int_in_words(marker_id)} of the {MARKER_DICT_NAME} set "
        f"(4 x 4 bits). Tell the program this side if you print the card at another size.\n"
        f"Keep the white margin ({QUIET_MODULES} squares of the pattern) clear; "
        "you may cut along the grey dashed line.",
        new_x="LEFT",
        new_y="NEXT",
    )
    y = max(block_bottom, pdf.get_y()) + 8.0

    y = _draw_scale_bar(pdf, _MARGIN, y) + 8.0
    y = _draw_check_square(pdf, _MARGIN, y) + 7.0

    pdf.set_xy(_MARGIN, y)
    pdf.set_font("Helvetica", "B", 11)
    pdf.cell(0, 6, "Taking the photo", new_x="LMARGIN", new_y="NEXT")
    pdf.set_font("Helvetica", "", 9)
    steps = [
        "Lay the card flat beside the test face, with the marker at the same height as the face "
        "(put a spacer under the card if the face stands proud).",
        "Fill the frame with the face and the marker; keep the whole marker and its white margin in the picture.",
        "Hold the camera square-on to the face, tilted no more than 30 degrees.",
        "Use soft, even light without glare on the marker; avoid a flash pointing straight at it.",
        "Keep the card clean, flat and uncreased; print a new one when it is worn.",
    ]
    for i, step in enumerate(steps, 1):
        pdf.set_x(_MARGIN)
        pdf.multi_cell(_PAGE_W - 2 * _MARGIN, 4.6, f"{i}.  {step}", new_x="LMARGIN", new_y="NEXT")
    pdf.ln(3)
    pdf.set_font("Helvetica", "I", 8)
    pdf.multi_cell(
        _PAGE_W - 2 * _MARGIN,
        4.0,
        "Measurements from photos carry an uncertainty that the program reports. Verify limits against the "
        "code edition in force; final acceptance rests with qualified personnel under the applicable codes "
        "and contracts.",
        new_x="LMARGIN",
        new_y="NEXT",
    )
    return bytes(pdf.output())


def _draw_marker(pdf: FPDF, x: float, y: float, side: float, marker_id: int) -> None:
    """All black modules as sub-paths of ONE filled path (no seams between modules)."""
    black = marker_modules(marker_id)
    m = side / MODULES
    with pdf.new_path() as path:
        path.style.fill_color = "#000000"
        path.style.stroke_color = None
        path.style.paint_rule = PathPaintRule.FILL_NONZERO
        for r in range(MODULES):
            c = 0
            while c < MODULES:
                if not black[r, c]:
                    c += 1
                    continue
                c0 = c
                while c < MODULES and black[r, c]:
                    c += 1
                # one clockwise rectangle per horizontal run of black modules
                x0, x1 = x + c0 * m, x + c * m
                y0, y1 = y + r * m, y + (r + 1) * m
                path.move_to(x0, y0)
                path.line_to(x1, y0)
                path.line_to(x1, y1)
                path.line_to(x0, y1)
                path.close()


def _draw_scale_bar(pdf: FPDF, x0: float, y: float) -> float:
    """0-100 mm bar; returns the y below it."""
    pdf.set_font("Helvetica", "", 7)
    pdf.set_text_color(0, 0, 0)
    base = y + 8.0
    pdf.set_fill_color(0, 0, 0)
    lw = 0.15
    pdf.rect(x0 - lw / 2, base - lw / 2, 100.0 + lw, lw, style="F")
    for mm in range(101):
        length = 5.0 if mm % 10 == 0 else (3.5 if mm % 5 == 0 else 2.0)
        pdf.rect(x0 + mm - lw / 2, base - length, lw, length, style="F")
        if mm % 10 == 0:
            label = str(mm)
            pdf.set_xy(x0 + mm - 5.0, base - 8.5)
            pdf.cell(10.0, 3.0, label, align="C")
    pdf.set_xy(x0 + 104.0, base - 4.0)
    pdf.set_font("Helvetica", "", 8)
    pdf.cell(60.0, 4.0, "millimetres (0 to 100)")
    return base + 1.0


def _draw_check_square(pdf: FPDF, x: float, y: float) -> float:
    s, f = CHECK_SQUARE_MM, CHECK_FRAME_MM
    pdf.set_fill_color(0, 0, 0)
    with pdf.new_path() as path:  # frame = outer square minus inner square
        path.style.fill_color = "#000000"
        path.style.stroke_color = None
        path.style.paint_rule = PathPaintRule.FILL_EVENODD
        for x0, y0, w in ((x, y, s), (x + f, y + f, s - 2 * f)):
            path.move_to(x0, y0)
            path.line_to(x0 + w, y0)
            path.line_to(x0 + w, y0 + w)
            path.line_to(x0, y0 + w)
            path.close()
    pdf.set_font("Helvetica", "B", 12)
    pdf.set_xy(x, y + s / 2 - 3)
    pdf.cell(s, 6, f"{s:g} mm", align="C")
    tx = x + s + 8.0
    pdf.set_xy(tx, y)
    pdf.set_font("Helvetica", "B", 11)
    pdf.cell(0, 6, "Check the print", new_x="LEFT", new_y="NEXT")
    pdf.set_font("Helvetica", "", 9)
    pdf.multi_cell(
        _PAGE_W - _MARGIN - tx,
        4.6,
        f"Measure the black square with a steel rule, outer edge to outer edge, across and down. "
        f"Both must be {s:g} mm (\u00b1 {CHECK_TOLERANCE_MM:g} mm). If not, the page was scaled while printing: "
        "print it again at 100 % (\"Actual size\"), with \"fit to page\" or \"shrink to fit\" turned off. "
        "Do not use a card that fails this check.",
        new_x="LEFT",
        new_y="NEXT",
    )
    return max(y + s, pdf.get_y())


# --------------------------------------------------------------------------- words

_ONES = (
    "zero one two three four five six seven eight nine ten eleven twelve thirteen fourteen fifteen "
    "sixteen seventeen eighteen nineteen"
).split()
_TENS = "_ _ twenty thirty forty fifty sixty seventy eighty ninety".split()


def _int_in_words(n: int) -> str:
    """0..999 in English words."""
    if n < 20:
        return _ONES[n]
    if n < 100:
        tens, ones = divmod(n, 10)
        return _TENS[tens] + ("" if ones == 0 else "-" + _ONES[ones])
    hundreds, rest = divmod(n, 100)
    return _ONES[hundreds] + " hundred" + ("" if rest == 0 else " and " + _int_in_words(rest))


def _mm_in_words(mm: float) -> str:
    """e.g. 20.0 -> 'twenty millimetres (20.0 mm)', 12.5 -> 'twelve point five millimetres (12.5 mm)'."""
    whole = int(mm)
    tenths = int(round((mm - whole) * 10))
    if tenths == 10:
        whole, tenths = whole + 1, 0
    words = _int_in_words(whole) + ("" if tenths == 0 else " point " + _ONES[tenths])
    return f"{words} millimetres ({mm:.1f} mm)"


# --------------------------------------------------------------------------- file


def _write_atomic(path: Path, data: bytes, *, force: bool) -> None:
    """Write to a temporary file beside ``path``, then move it into place."""
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    except OSError as err:
        raise SurfacesError(f"cannot write in '{path.parent}' ({err.strerror}): choose another folder") from None
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        if force:
            os.replace(tmp, path)
        else:
            try:
                os.link(tmp, path)  # fails if the file appeared meanwhile: never overwrite
            except FileExistsError:
                raise SurfacesError(
                    f"card file '{path}' already exists: choose another name or allow overwriting (force)"
                ) from None
            except OSError:
                if path.exists():
                    raise SurfacesError(
                        f"card file '{path}' already exists: choose another name or allow overwriting (force)"
                    ) from None
                os.replace(tmp, path)  # file system without hard links
    except OSError as err:
        raise SurfacesError(f"cannot write the card '{path}' ({err.strerror or err}): check the folder") from None
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
