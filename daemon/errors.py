"""The one error type for mistakes a user can cause (bad config, file or message)."""


class CubecastError(Exception):
    """A user-facing error; its message names what is wrong. The CLI prints it on one line and exits 2."""
