"""skewfix: measure and remove rolling-shutter skew in footage."""

__version__ = "0.1.0"
