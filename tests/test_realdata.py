"""Recall of annotated defects on real third-party photos (shared/realdata, evaluation only).

The photos are rolled steel strip (NEU-DET, SD-saliency-900) and ferrite
tiles (magnetic-tile) with their authors' annotations: not weld faces, so
these are sanity figures, not weld accuracy.  Each image is segmented whole
at an assumed 10 px/mm; an annotation is found when the detections cover at
least 10 % of it (the dataset loader's own ``hit``) or a detection's
centroid lies in its box.  A quarter of the images (every 4th) keeps the
run short; ``surfaces bench`` runs all of them.

Sanity floors asserted (stated, not targets): overall recall at least 0.3,
and a detector that marks everything would be caught by the second check:
on defect-free tiles the detections cover under 25 % of the image area.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from surfaces.bench import DEFAULT_REALDATA, format_table, realdata_recall

RECALL_FLOOR = 0.3
FREE_COVER_CEILING = 0.25

pytestmark = [
    pytest.mark.skipif(not (DEFAULT_REALDATA / "load.py").exists(), reason=f"no realdata folder at {DEFAULT_REALDATA}"),
    pytest.mark.slow,
]


@pytest.fixture(scope="module")
def figures():
    r = realdata_recall(DEFAULT_REALDATA, stride=4, workers=2)
    print("\n" + format_table({"realdata": r}))
    return r


def test_realdata_recall_sanity_floor(figures):
    o = figures["overall"]
    assert o["annotations"] > 100
    assert o["recall"] >= RECALL_FLOOR, f"overall recall {o['recall']:.2f} ({o['found']}/{o['annotations']})"


def test_defect_free_tiles_are_not_blanketed(figures):
    fr = figures["defect_free"]
    assert fr["images"] >= 3
    assert fr["covered_frac"] < FREE_COVER_CEILING, (
        f"detections cover {fr['covered_frac']:.1%} of the defect-free tiles "
        f"({fr['per_image']:.1f} detections per image)")


def test_every_dataset_is_scored(figures):
    names = {k.split("/")[0] for k in figures["groups"]}
    assert names == {p.name for p in Path(DEFAULT_REALDATA).iterdir() if p.is_dir()}
