"""What one or two lift heights tell without the lift-series decomposition: :func:`analyse_imaging`.

The decomposition into magnetic, electrostatic and short-range parts needs the decay of the contrast over at
least three heights. One or two heights still give:

* per-image statistics: the image mean with its standard error, the rms contrast about the mean with the
  noise taken out in quadrature;
* the phase noise against the thermal limit (Albrecht et al. 1991), from the most direct noise estimate the
  series offers (the repeat pass, else the difference of two bias images at one height, else the high spatial
  frequencies of the top image, which is an upper bound where magnetic contrast reaches them);
* the repeat-pass check for a tip that changed the sample;
* with a bias grid (at least three biases) the contact potential difference V_cpd: the electrostatic gradient
  is ``1/2 C''(z) (V - V_cpd)^2`` (Hudlet, Saint Jean, Guthmann & Berger 1998, Eur. Phys. J. B 2, 5; the
  capacitance of a sphere over a plane after Smythe, Static and Dynamic Electricity), so the image mean is a
  parabola in V whose vertex is V_cpd at every height. No height series is needed. The phase is turned into the
  gradient (with k and Q) or into ``-tan(phase) = Q F'/k`` (without), after the drive's phase offset from
  quadrature is read from the same means (:mod:`..lift_series.drive_offset`).

The error model of V_cpd is in :mod:`.parabola`; the result is :class:`.result.ImagingAnalysis`.
"""

from .analysis import analyse_imaging
from .errors import ImagingInputError
from .parabola import BiasParabola, fit_bias_parabola
from .result import DECOMPOSITION_MIN_HEIGHTS, ImagingAnalysis, decomposition_needs

__all__ = ["DECOMPOSITION_MIN_HEIGHTS", "BiasParabola", "ImagingAnalysis", "ImagingInputError", "analyse_imaging",
           "decomposition_needs", "fit_bias_parabola"]
