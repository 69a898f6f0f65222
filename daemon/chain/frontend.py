"""The front end's monitors (and, next, its mitigation): per frame and receive channel, what a board
under bring-up is doing to its samples.

FRONTEND_DTYPE is one record per RX channel (little-endian):
  clipped_samples      samples (complex) with I or Q at or beyond the ADC full scale
  samples              samples looked at (chirps x samples per chirp)
  interference_bursts  contiguous runs of flagged samples in fast time, counted over the frame
  interference_samples samples flagged (and mitigated when mitigation is on)
  noise_floor_db       10 log10 of the channel's noise power per complex sample, counts^2
  dc_offset_counts     magnitude of the channel's complex mean over the frame, before removal
  image_rejection_db   blind image-rejection estimate of the frame, before correction
"""

from __future__ import annotations

import numpy as np

FRONTEND_FIELDS = (
    ("clipped_samples", "<u4"),
    ("samples", "<u4"),
    ("interference_bursts", "<u4"),
    ("interference_samples", "<u4"),
    ("noise_floor_db", "<f4"),
    ("dc_offset_counts", "<f4"),
    ("image_rejection_db", "<f4"),
)
FRONTEND_DTYPE = np.dtype(list(FRONTEND_FIELDS))
