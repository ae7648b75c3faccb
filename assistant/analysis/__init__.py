"""Pure analysis functions on numpy arrays, one folder per family; no I/O, usable from a notebook.

* :mod:`assistant.analysis.calibration` — the cantilever: thermal spectra, Sader, drive sweeps, force curves.
* :mod:`assistant.analysis.lift_series` — the lift-height series: registration, Laplace continuation, image-mean
  parts, noise floor, tip change and the recommended lift height (:func:`~.lift_series.analyse_series`).

Importing this package imports no family: each family (and scipy with it) loads only when used.
"""
