"""``benchrun sim``: run the simulated bench in the foreground and print its VISA resources."""

from __future__ import annotations

import argparse
import threading

from benchrun.simulator.server import ROLES, SimulatedBench


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "sim",
        help="run the simulated bench (SCPI servers on TCP) until Ctrl-C",
        description="Start the five simulated instruments (scope, pulse, supply, thermal, "
        "handler) and print the VISA resource string of each. Ctrl-C stops them.",
    )
    parser.add_argument("--host", default="127.0.0.1", help="address to listen on")
    parser.add_argument("--port-base", type=int, default=0,
                        help="first TCP port (roles use N..N+4); 0 picks free ports")
    parser.add_argument("--seed", type=int, default=0,
                        help="noise seed ('benchrun run --sim-seed' is the same setting)")
    parser.add_argument("--speedup", dest="clock_speedup", type=float, default=100.0,
                        help="simulated seconds per wall-clock second (thermal, bus charge); "
                             "'benchrun run --sim-speedup' is the same setting")
    parser.add_argument("--clock-speedup", dest="clock_speedup", type=float,
                        help=argparse.SUPPRESS)
    parser.set_defaults(func=run)


def run(args: argparse.Namespace, stop: threading.Event | None = None) -> int:
    """Serve until Ctrl-C (or until ``stop`` is set, for tests)."""
    bench = SimulatedBench(seed=args.seed, clock_speedup=args.clock_speedup)
    resources = bench.start(host=args.host, port_base=args.port_base)
    try:
        for role in ROLES:
            print(f"{role:8s} {resources[role]}", flush=True)
        print("simulated bench running; Ctrl-C stops it", flush=True)
        waiter = stop or threading.Event()
        while not waiter.wait(0.5):
            pass
    except KeyboardInterrupt:
        print("stopping the simulated bench", flush=True)
    finally:
        bench.stop()
    return 0
