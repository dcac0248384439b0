"""Seeded synthetic photos of weld test faces whose truth is known by construction.

For tests, the demo and the benchmark only; the runtime never imports this
package.

render_fracture   fillet-weld break or nick-break fracture face beside the card
render_bend       guided-bend coupon (optionally curved) beside the card
generate_set      many photos + truth JSON + manifest.csv (also ``python -m surfaces.synth``)
marker_image      the DICT_4X4_50 marker, OpenCV's pattern in whole-pixel modules
SynthPhoto        rendered photo (``rgb``) and its ``truth`` dict; ``save(path)``

Truth (``surfaces.truth/1``), all mm on the card's plane unless named ``_px``
------------------------------------------------------------------------------
* plane frame = the first marker's own: origin at its top-left outer corner,
  X along its top edge, Y along its left edge, so ``markers[0].corners_mm`` is
  ``[[0, 0], [S, 0], [S, S], [0, S]]``.
* ``H_plane_to_photo`` (3x3) maps plane (X, Y) to photo pixels (x, y), pixel
  centres at integers; ``px_per_mm_face`` = sqrt|det J| of it at
  ``face.centroid_mm``.
* ``face``: ``polygon_mm`` / ``polygon_px``, ``length_mm`` (along the weld;
  true arc length on a bend coupon), ``width_mm``, ``area_mm2`` (true),
  ``axis_deg`` (direction of face +x in the plane), ``root_side`` (y0, y1,
  unknown), ``A_face_to_plane`` (face axes -> plane; projected face axes on a
  curved coupon).  On a bend coupon the face is the inspected arc, and
  ``face.visible`` is the surface drawn in the photo (the cylinder goes on
  8-25 degrees beyond the arc's ends and nothing marks where the arc ends):
  ``polygon_mm``/``_px``, ``length_mm``, ``width_mm``, ``area_mm2``
  projected onto the card's plane, as the tool measures a coupon;
  ``face_x0_mm``/``face_x1_mm`` (projected face axes), ``surface_x0_mm``/
  ``surface_x1_mm`` and ``arc_length_mm``, ``arc_area_mm2`` (true surface x
  from the inspected arc's start), ``half_angle_deg``.  Older truth files
  lack it; ``_bend.visible_face`` replays it from the seed when it can.
* ``imperfections``: ``kind``, ``iso6520``, ``centroid_mm``/``_px``,
  ``bbox_px``, ``greatest_mm`` (max Feret), ``width_mm`` (min Feret),
  ``along_mm``, ``across_mm``, ``area_mm2`` (analytic for circles, ellipses,
  capsules; from a fine outline otherwise), ``face_mm`` (centroid and extent in
  face axes), ``starts_at_edge``, ``polygon_mm``/``_px``, ``shape``
  (construction parameters); on bend coupons also ``cause`` and
  ``projected`` sizes (as seen in the plane).
* ``distractors``: ``type`` (speck, smudge, bright_facet, edge_shadow, rust,
  grinding_mark) and ``centroid_mm``/``_px`` - things that are not
  imperfections.
* ``curvature`` (bend): ``enabled``, ``radius_mm``, ``arc_length_mm``,
  ``projected_length_mm``, ``half_angle_deg``, mapping
  ``x = Lp/2 + R sin((s - L/2)/R)``.
* ``look``, ``camera``, ``light``, ``table``, ``params``: how it was made.
"""

from __future__ import annotations

from ._api import generate_set, render_bend, render_fracture
from ._card import marker_image
from ._scene import SCHEMA, SynthError, SynthPhoto

__all__ = ["SCHEMA", "SynthError", "SynthPhoto", "generate_set", "marker_image", "render_bend", "render_fracture"]
