"""Public entry points of :mod:`surfaces.synth`."""

from __future__ import annotations

from typing import Any

from ._bend import BendBuilder
from ._fracture import FractureBuilder
from ._set import generate_set  # noqa: F401  (re-exported)
from ._scene import SynthPhoto, render_scene

#: options every scene passes straight to the shared renderer
COMMON = (
    "megapixels", "aspect", "portrait", "tilt_deg", "px_per_mm", "marker_mm", "n_markers",
    "ruler", "defects", "distractors", "clean", "jpeg_quality", "table",
)  # fmt: skip


def render_fracture(
    seed: int,
    *,
    test: str = "fillet-break",
    megapixels: float | None = None,
    aspect: float | None = None,
    portrait: bool | None = None,
    tilt_deg: float | None = None,
    px_per_mm: float | None = None,
    marker_mm: float | None = None,
    n_markers: int = 1,
    ruler: bool | None = None,
    defects: Any = "mixed",
    distractors: bool = True,
    length_mm: float | None = None,
    width_mm: float | None = None,
    plate: str | None = None,
    table: str | None = None,
    clean: bool = False,
    jpeg_quality: int | None = None,
) -> SynthPhoto:
    """Photo of a broken fillet weld or nick-break face beside the reference card.

    Parameters
    ----------
    seed : int
        Everything random follows from it (same seed, same photo and truth).
    test : {"fillet-break", "nick-break"}
    megapixels, aspect, portrait : photo size (random 2..12 MP, 4:3/3:2/16:9/1:1).
    tilt_deg : camera tilt from the plane normal, degrees (random 0..30).
    px_per_mm : wanted scale at the face centre (random 8..25, within what fits).
    marker_mm : printed marker side S in mm (random 10..40).
    n_markers : 1 or 2 markers on the card.
    defects : "mixed", "none" or a list of dicts such as
        ``{"kind": "pore", "d_mm": 2.0, "x_mm": 30, "y_mm": 4}`` (face mm);
        see :class:`surfaces.synth._fracture.FractureBuilder` for the keys.
    distractors : add specks, smudges, bright facets, edge shadow.
    length_mm, width_mm : fix the face size (mm).
    plate, table : fix the plate finish / background kind.
    clean : no tilt, glare, blur, noise, vignetting or JPEG (for exact checks).
    jpeg_quality : fix the camera's JPEG quality (random 70..95).

    Returns
    -------
    SynthPhoto
    """
    opts = {k: v for k, v in locals().items() if k in COMMON}
    return render_scene(seed, FractureBuilder(test, length_mm=length_mm, width_mm=width_mm, plate=plate), **opts)


def render_bend(
    seed: int,
    *,
    curvature: bool = True,
    radius_mm: float | None = None,
    thickness_mm: float | None = None,
    width_mm: float | None = None,
    length_mm: float | None = None,
    megapixels: float | None = None,
    aspect: float | None = None,
    portrait: bool | None = None,
    tilt_deg: float | None = None,
    px_per_mm: float | None = None,
    marker_mm: float | None = None,
    n_markers: int = 1,
    ruler: bool | None = None,
    defects: Any = "mixed",
    distractors: bool = True,
    table: str | None = None,
    clean: bool = False,
    jpeg_quality: int | None = None,
) -> SynthPhoto:
    """Photo of a guided-bend coupon's convex surface beside the reference card.

    Parameters
    ----------
    curvature : bool
        Render the surface as a cylinder of outer radius ``radius_mm``
        (default former radius + thickness) seen from above; truth sizes are
        true arc lengths, ``projected`` sizes are as seen in the plane.
    radius_mm, thickness_mm, width_mm, length_mm : fix the coupon (mm);
        ``length_mm`` is the inspected arc length.
    defects : "mixed", "none" or a list of dicts such as
        ``{"kind": "crack", "length_mm": 3, "angle_deg": 90, "edge": "y0"}``
        (kinds crack, pore, inclusion; positions ``x_mm``/``y_mm`` in surface mm).
    Other parameters as :func:`render_fracture`.
    """
    opts = {k: v for k, v in locals().items() if k in COMMON}
    builder = BendBuilder(
        curvature=curvature, radius_mm=radius_mm, thickness_mm=thickness_mm, width_mm=width_mm, length_mm=length_mm
    )
    return render_scene(seed, builder, **opts)
