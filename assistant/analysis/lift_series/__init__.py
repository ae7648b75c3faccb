"""The lift-height series: registration, Laplace continuation, image-mean parts, noise floor, tip change and
the recommended lift height. The entry point is :func:`analyse_series`."""

from .decomposition import SeriesAnalysis, SeriesInputError, analyse_series
