"""mfm-assistant: cantilever calibration and lift-height series analysis for magnetic force microscopy."""

__version__ = "0.1.0"
