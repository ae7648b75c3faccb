"""``mfma serve``: expose the simulated controller over a serial pseudo-terminal or ZeroMQ."""

from __future__ import annotations

import json
import signal
import sys
import threading


def run(args) -> int:
    from drivers.registry import open_controller
    from drivers.server import serve
    from drivers.fault_plan import FaultPlan

    options = {"pace": args.pace}
    if args.scenario:
        options["scenario"] = args.scenario
    if args.seed is not None:
        options["seed"] = args.seed
    if args.faults:
        options["faults"] = FaultPlan.from_specs([s for s in args.faults.split(",") if s.strip()])
    stop = threading.Event()

    def announce(info: dict) -> None:
        sys.stdout.write(json.dumps(info) + "\n")
        sys.stdout.flush()

    def on_term(signum, frame) -> None:
        stop.set()

    signal.signal(signal.SIGTERM, on_term)
    with open_controller("sim://", **options) as ctl:
        try:
            # the plan holds the scenario's faults and --faults; stage kinds already wrap the stage,
            # the link kinds are the server's to apply
            serve(ctl, transport=args.transport, bind=args.bind, server_key=args.server_key, allow_dir=args.allow,
                  watchdog_s=args.watchdog, faults=ctl.fault_plan, announce=announce, stop=stop)
        except KeyboardInterrupt:
            pass
    return 0
