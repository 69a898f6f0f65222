"""The one error type for mistakes a user can cause (bad config, file or message), and the two type
checks every validator uses before it names a value in such an error."""

from __future__ import annotations

import numpy as np


class CubecastError(Exception):
    """A user-facing error; its message names what is wrong. The CLI prints it on one line and exits 2."""


def is_integer(value) -> bool:
    """An int (Python or numpy), not a bool."""
    return isinstance(value, (int, np.integer)) and not isinstance(value, (bool, np.bool_))


def is_real(value) -> bool:
    """An int or float (Python or numpy), not a bool. Finiteness is the caller's rule."""
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_))
