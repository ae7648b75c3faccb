"""Controller URLs to driver plug-ins.

Built-in drivers are listed in :data:`BUILTIN`; third-party drivers register a class under the entry-point
group ``mfm_assistant.drivers`` (name = URL scheme). The table is read once and not changed afterwards.
"""

from __future__ import annotations

import functools
import importlib
import ipaddress
from dataclasses import dataclass
from importlib.metadata import entry_points
from urllib.parse import urlsplit

from drivers.errors import BadURL, UnknownScheme

ENTRY_POINT_GROUP = "mfm_assistant.drivers"

#: scheme -> "module:Class" for the drivers that ship with the project.
BUILTIN: dict[str, str] = {
    "sim": "drivers.simulated:SimulatedController",
    "serial": "drivers.serial_link:SerialController",
    "socket": "drivers.serial_link:SerialController",
    "zmq+tcp": "drivers.network_link:NetworkController",
}


@dataclass(frozen=True)
class DriverEntry:
    scheme: str
    target: str  # "module:Class"
    origin: str  # "built-in" or the distribution that registered it

    def load(self) -> type:
        module_name, _, attr = self.target.partition(":")
        return getattr(importlib.import_module(module_name), attr)


@functools.cache
def available() -> dict[str, DriverEntry]:
    """Every scheme that can be opened, built-ins first; an entry point may add schemes, not replace them."""
    table = {s: DriverEntry(s, t, "built-in") for s, t in BUILTIN.items()}
    for ep in entry_points(group=ENTRY_POINT_GROUP):
        if ep.name in table:
            continue
        dist = getattr(ep, "dist", None)
        table[ep.name] = DriverEntry(ep.name, ep.value, dist.name if dist else "entry point")
    return table


def scheme_of(url: str) -> str:
    if not isinstance(url, str) or "://" not in url:
        raise BadURL(f"controller URL {url!r} has no scheme (expected e.g. sim://, serial:///dev/ttyUSB0)")
    return urlsplit(url).scheme.lower()


def open_controller(url: str = "sim://", **options: object):
    """Open the controller named by ``url`` with the driver registered for its scheme."""
    scheme = scheme_of(url)
    entry = available().get(scheme)
    if entry is None:
        known = ", ".join(sorted(available()))
        raise UnknownScheme(f"no driver for controller URL scheme {scheme!r} (installed: {known})")
    cls = entry.load()
    return cls.from_url(url, **options)


def redact(url: str) -> str:
    """The URL without anything secret: query values naming key files are replaced by their file names only."""
    parts = urlsplit(url)
    original = parts
    if parts.password:
        netloc = parts.netloc.replace(f":{parts.password}@", ":***@")
        parts = parts._replace(netloc=netloc)
    if parts.query:
        kept = []
        for item in parts.query.split("&"):
            key, _, value = item.partition("=")
            if "secret" in key.lower() or key.lower() in {"client", "key", "password", "token"}:
                value = "***"
            kept.append(f"{key}={value}" if value else key)
        parts = parts._replace(query="&".join(kept))
    # geturl() drops an empty authority ("sim://" -> "sim:"), so rebuild only when something was hidden
    return url if parts == original else parts.geturl()


def is_loopback(host: str) -> bool:
    """Whether ``host`` (a name, an IPv4 or an IPv6 address, bracketed or not) is this machine's loopback."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False
