"""The driver conformance kit: does a :class:`drivers.base.Controller` keep the interface's promises?

SI units, limits refused rather than clipped, withdraw always allowed and idempotent, errors on the tree,
capabilities that match what is implemented, an ``abort()`` that stops a long call at once, and a magnet's field
back at 0 after ``make_safe()`` and ``abort()`` (:mod:`.checks_field`). The checks come in levels, each including
the ones before it:

``identity``  info, capabilities, limits, URL; nothing is called that acts on the instrument
``signals``   readings, drive, records, sweeps, capabilities, and safety without motion (the default)
``motion``    Z, XY and coarse moves clear of the surface (asks first)
``engaged``   an approach, a two-pass line, an abort mid-line, and a link's watchdog (asks first)

``run_checks(controller, level=..., url=..., confirm=...)`` returns a :class:`KitResult`; ``mfma drivers check
URL`` is its command line, and ``mfma drivers new NAME DIR`` writes a plug-in skeleton whose test runs the kit.
Whatever happens, the stage is left safe (``abort()``, else each safe step on its own; a field still on is set to
0 directly), and the last check, ``end.safe``, says whether status and the field reading confirm it.
"""

from drivers.conformance.kit import LEVELS, PLANS, Check, KitResult
from drivers.conformance.kit import run as run_checks

__all__ = ["LEVELS", "PLANS", "Check", "KitResult", "run_checks"]
