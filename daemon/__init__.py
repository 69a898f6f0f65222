"""cubecast: FMCW MIMO radar processing chain (everything but the viewer)."""

__version__ = "0.1.0"
