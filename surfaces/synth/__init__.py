"""Seeded synthetic photos of weld test faces whose truth is known by construction.

For tests, the demo and the benchmark only; the runtime never imports this
package.

render_fracture   fillet-weld break or nick-break fracture face beside the card
render_bend       guided-bend coupon (optionally curved) beside the card
generate_set      many photos + truth JSON + manifest.csv
marker_image      the DICT_4X4_50 marker as OpenCV draws it
SynthPhoto        rendered photo (``rgb``) and its ``truth`` dict
"""

from __future__ import annotations

from ._api import generate_set, render_bend, render_fracture
from ._card import marker_image
from ._scene import SCHEMA, SynthError, SynthPhoto

__all__ = ["SCHEMA", "SynthError", "SynthPhoto", "generate_set", "marker_image", "render_bend", "render_fracture"]
