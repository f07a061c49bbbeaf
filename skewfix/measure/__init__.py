"""Readout measurement: flicker bands, pans across vertical edges, and
self-calibration from the footage's own motion."""

from skewfix.measure.result import ReadoutEstimate

__all__ = ["ReadoutEstimate"]
