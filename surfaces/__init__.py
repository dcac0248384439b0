"""surfaces: measure and judge weld test faces from a photo beside a printed reference mark.

Stages (one module each, pure functions on arrays and dataclasses):

photo       load a photo: EXIF orientation, 8/16 bit, SHA-256, clear errors
card        the printable reference card (PDF)
calibrate   reference-mark detection, homography to the mm plane, scale, tilt, uncertainty
face        find the test face and rectify it into its own mm axes
segment     pores, slag inclusions, unfused regions and cracks on the rectified face
bend        bend-coupon edges, open discontinuities and curvature correction
measure     sizes in mm with uncertainty; outlines mapped back to the photo
limits      limit sets (TOML) with presets from published standards; verdicts
pipeline    one assessment from photo to verdict
report      overlay PNG, JSON, CSV and PDF reports
records     SQLite records store with photo copies and an append-only log
batch       many photos in worker processes, resumable
"""

__version__ = "0.1.0"
