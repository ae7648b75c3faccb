"""Plain yardstick of `mfma drivers`: the controller plug-ins found and loaded.

The listing reads the entry points of the plug-in group and loads every driver, so that a broken plug-in shows as
"cannot load". The built-in drivers need numpy (their data) and pyzmq (the network link; pyserial loads only
when a port opens): this script reads the same entry-point group and imports those, and nothing of the project.
"""
import json
from importlib.metadata import entry_points

import numpy  # noqa: F401
import zmq  # noqa: F401

builtin = ["sim", "serial", "socket", "zmq+tcp"]
found = sorted({ep.name for ep in entry_points(group="mfm_assistant.drivers")} - set(builtin))
print(json.dumps({"drivers": builtin + found}))
