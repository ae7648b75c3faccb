"""Checks of identity: info, capabilities, limits and URL; nothing is called that acts on the instrument.

The plausibility ranges of the limits are rules of thumb for scanning probe instruments (common practice, no
source): wide enough for any real instrument, narrow enough that a value in nm or µm passed off as metres, or in
mV as volts, falls outside.
"""

from __future__ import annotations

import dataclasses
import math
import re

from drivers.base import Capability, ControllerInfo, Limits
from drivers.conformance.kit import Fail, Kit

#: field -> (lowest, highest) plausible value in SI units
PLAUSIBLE = {
    "z_range_m": (1e-7, 1e-3), "z_speed_max_m_per_s": (1e-8, 1e-1), "bias_max_v": (1e-3, 1e3),
    "drive_max_v": (1e-3, 1e2), "coarse_travel_max_m": (1e-6, 1.0), "coarse_step_m": (1e-10, 1e-4),
    "scan_size_max_m": (1e-7, 1e-2), "sample_rate_max_hz": (1.0, 1e9), "frequency_max_hz": (1e3, 1e9),
    # a magnet's (common practice, no source: lab electromagnets reach about 1 mT to 10 T)
    "field_max_a_per_m": (1e3, 1e7), "field_ramp_a_per_m_per_s": (1.0, 1e8), "field_settle_s": (1e-3, 1e3),
}
_SCHEME = re.compile(r"^[a-z][a-z0-9+.-]*$")


def info(kit: Kit) -> str:
    i = kit.controller.info
    if not isinstance(i, ControllerInfo):
        raise Fail(f"info is a {type(i).__name__}, not drivers.base.ControllerInfo")
    values = [i.maker, i.model, i.serial, i.firmware]
    bad = [n for n, v in zip(("maker", "model", "serial", "firmware"), values)
           if not isinstance(v, str) or not v.strip() or not v.isprintable()]
    if bad:
        raise Fail(f"info field(s) {', '.join(bad)} empty or not printable text")
    return f"info: maker {i.maker!r}, model {i.model!r}, serial {i.serial!r}, firmware {i.firmware!r}"


def capabilities(kit: Kit) -> str:
    caps = kit.controller.capabilities
    if not isinstance(caps, (set, frozenset)):
        raise Fail(f"capabilities is a {type(caps).__name__}, not a set of drivers.base.Capability")
    unknown = [repr(c) for c in caps if not isinstance(c, Capability)]
    if unknown:
        raise Fail(f"capabilities holds unknown flags {', '.join(sorted(unknown))}")
    return f"declares {len(caps)} known capabilities: {', '.join(sorted(c.value for c in caps)) or 'none'}"


def limits(kit: Kit) -> str:
    ctl, lim = kit.controller, kit.controller.limits
    if not isinstance(lim, Limits):
        raise Fail(f"limits is a {type(lim).__name__}, not drivers.base.Limits")
    problems, checked = [], 0
    for f in dataclasses.fields(Limits):
        v = getattr(lim, f.name)
        low, high = PLAUSIBLE[f.name]
        if f.name == "bias_max_v" and not ctl.has(Capability.BIAS) and v == 0:
            continue  # no bias source: a zero limit says so
        if f.name.startswith("field_") and not ctl.has(Capability.APPLIED_FIELD):
            continue  # no magnet: its limits do not apply
        checked += 1
        if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
            problems.append(f"{f.name} = {v!r} is not a positive finite number")
        elif not low <= v <= high:
            problems.append(f"{f.name} = {v:g} is outside the plausible SI range [{low:g}, {high:g}] "
                            f"(wrong unit?)")
    if problems:
        raise Fail("; ".join(problems))
    return (f"all {checked} limits positive, finite and plausible in SI, e.g. Z range "
            f"{lim.z_range_m * 1e6:g} µm, bias ±{lim.bias_max_v:g} V")


def url(kit: Kit) -> str:
    from drivers.registry import available, scheme_of

    cls = type(kit.controller)
    schemes = getattr(cls, "schemes", ())
    if not schemes or not all(isinstance(s, str) and _SCHEME.match(s) for s in schemes):
        raise Fail(f"{cls.__name__}.schemes = {schemes!r} does not name URL schemes")
    if kit.url is None:
        return f"{cls.__name__} handles {', '.join(s + '://' for s in schemes)} (no URL given to round-trip)"
    scheme = scheme_of(kit.url)
    entry = available().get(scheme)
    if entry is None:
        raise Fail(f"no installed driver handles {scheme}:// (is the entry point registered?)")
    loaded = entry.load()
    if loaded is not cls or scheme not in schemes:
        raise Fail(f"the registry opens {scheme}:// with {entry.target}, not with {cls.__module__}."
                   f"{cls.__name__}")
    return f"{scheme}:// opens {entry.target} ({entry.origin}), the class under test"


IDENTITY = [("identity.info", info), ("identity.capabilities", capabilities), ("identity.limits", limits),
            ("identity.url", url)]
