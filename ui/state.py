"""What the page remembers between reruns, and the cached analysis.

* :func:`analyse` runs :func:`surfaces.pipeline.assess` once per photo and
  *analysis settings* (``st.cache_data`` keyed on the photo's SHA-256 and
  :meth:`Settings.key`), with a progress bar fed by the pipeline's callback.
  The limit set and (except for bends) the nominal sizes only reach the
  verdict, so they are left out of the analysis key: changing them re-judges
  without re-analysing.
* A :class:`Work` is one photo being assessed in this session: the analysis
  result, the automatic assessment (judged with the chosen limit set), the
  inspector's :class:`~ui.review.Review` and the record id once saved.  All
  works of the session stay in ``st.session_state`` so a bad upload never
  loses earlier work, and a review action only re-judges.
"""

from __future__ import annotations

import copy
import hashlib
import os
from collections import OrderedDict
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

import streamlit as st

from surfaces.limits import judge_assessment, limits_summary
from surfaces.model import Photo, Settings

from .review import Review

MAX_WORKS = 6  # works whose pixels stay in memory; older ones keep only their dicts


@dataclass
class Work:
    key: str
    name: str
    sha256: str
    data: bytes | None
    photo: Photo | None
    result: object | None  # surfaces.pipeline.Result, or None for a re-opened record
    auto_base: dict  # the pipeline's assessment (judged with the analysis settings)
    settings: Settings
    coupon: dict = field(default_factory=dict)
    review: Review = field(default_factory=Review)
    saved_id: int | None = None
    saved_review: str | None = None  # fingerprint of the review last saved
    origin: str = "upload"  # upload, camera, demo, record
    _judged: dict = field(default_factory=dict, repr=False)

    def auto(self, settings: Settings, limit_set) -> dict:
        """The automatic assessment judged with ``settings``' nominal sizes and ``limit_set``."""
        from surfaces.limits import to_toml

        k = (settings.key(), to_toml(limit_set))
        if k not in self._judged:
            base = copy.deepcopy(self.auto_base)
            base["settings"] = asdict(settings)
            base["nominal"] = {k2: v for k2, v in (settings.nominal or {}).items() if v is not None}
            out = judge_assessment(base, limit_set)
            out["limits"] = limits_summary(limit_set)
            self._judged.clear()
            self._judged[k] = out
        return self._judged[k]


def works() -> "OrderedDict[str, Work]":
    if "works" not in st.session_state:
        st.session_state["works"] = OrderedDict()
    return st.session_state["works"]


def add_work(w: Work) -> Work:
    ws = works()
    ws[w.key] = w
    ws.move_to_end(w.key)
    for old in list(ws.values())[:-MAX_WORKS]:
        old.photo, old.data, old.result = None, None, None
    st.session_state["current"] = w.key
    return w


def current() -> Work | None:
    key = st.session_state.get("current")
    return works().get(key) if key else None


def sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def analysis_settings(s: Settings) -> Settings:
    """The part of the settings the image analysis depends on (see the module docstring)."""
    return replace(s, limits=None, nominal=dict(s.nominal) if s.test == "bend" else {})


def work_key(sha: str, s: Settings) -> str:
    return hashlib.sha256((sha + analysis_settings(s).key()).encode()).hexdigest()[:16]


@st.cache_data(show_spinner=False, max_entries=8)
def _cached_assess(photo_sha256: str, settings_key: str, _photo: Photo, _settings: Settings):
    from surfaces.pipeline import assess

    box = st.empty()
    bar = box.progress(0.0, text="starting the analysis")

    def say(msg: str, frac: float) -> None:
        bar.progress(min(max(float(frac), 0.0), 1.0), text=msg)

    try:
        return assess(_photo, _settings, progress=say)
    finally:  # also when the analysis fails: no half-full bar left on the page
        box.empty()


def analyse(photo: Photo, settings: Settings):
    """The pipeline's :class:`~surfaces.pipeline.Result` for ``photo`` and ``settings`` (cached)."""
    s = analysis_settings(settings)
    return _cached_assess(photo.sha256, s.key(), photo, s)


def db_path() -> Path:
    from surfaces.records import default_db_path

    return default_db_path()


def store():
    """A records store on ``$SURFACES_DB``; use as ``with store() as s:``.

    Opened per use: a session's reruns may run on different threads and an
    SQLite connection belongs to the thread that opened it.
    """
    from surfaces.records import Store

    return Store(db_path())


def env_flag(name: str) -> bool:
    return os.environ.get(name, "").strip().lower() in ("1", "true", "yes")
