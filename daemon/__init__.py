"""cubecast: FMCW MIMO radar processing chain (everything but the viewer)."""

__version__ = "0.1.0"


def __getattr__(name: str):
    """`from cubecast.daemon import PointStream`: the tracker client, imported only when asked for."""
    if name == "PointStream":
        from .pointstream import PointStream
        return PointStream
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
