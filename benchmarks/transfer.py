"""Waveform transfer speed: pyvisa + pyvisa-py block read vs a plain socket, same run.

A 10,000,000-sample trace is stored in the simulated scope and read back
(1) through the role driver's session (pyvisa, ``@py`` backend, terminator disabled, header
    parsed, exact-size reads — DESIGN.md §7) and
(2) by a plain ``socket`` that sends the same query and ``recv_into``s the same block,
for the int8 family (``scope-generic``) and the int16 family (``scope-alt``), on random codes
and on a flat trace at code 10 (every byte 0x0A = "\\n", the terminator-scan pitfall).
Prints MB/s of both paths and their ratio (goal: pyvisa path >= 0.5 x plain socket).

With ``--naive`` it also times pyvisa's terminator-scanning read (``read_raw`` with the
read terminator left on) on a short flat trace, to show why the fast path exists.

Run: ``python benchmarks/transfer.py [--samples N] [--repeats R] [--naive]``
"""

from __future__ import annotations

import argparse
import os
import socket
import statistics
import time
import types

import numpy as np

from benchrun.instruments import scpi
from benchrun.instruments.roles import connect
from benchrun.simulator.capture import PatternCaptureModel
from benchrun.simulator.server import SimulatedBench


def plain_socket_read(host: str, port: int, commands: list[str], terminator: bool) -> int:
    """Send ``commands`` and read one definite-length block with bare socket calls."""
    with socket.create_connection((host, port), timeout=30) as sock:
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        sock.sendall("".join(c + "\n" for c in commands).encode("ascii"))
        head = _recv_exact(sock, 2)
        n = scpi.block_digit_count(head)
        length = scpi.block_data_length(bytes(_recv_exact(sock, n)))
        buf = bytearray(length + (1 if terminator else 0))
        view = memoryview(buf)
        got = 0
        while got < len(buf):
            k = sock.recv_into(view[got:])
            if k == 0:
                raise ConnectionError("closed mid-block")
            got += k
        return length


def _recv_exact(sock: socket.socket, n: int) -> bytearray:
    out = bytearray()
    while len(out) < n:
        chunk = sock.recv(n - len(out))
        if not chunk:
            raise ConnectionError("closed")
        out += chunk
    return out


def _timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def paired_times(visa_fn, socket_fn, repeats: int) -> tuple[list[float], list[float]]:
    """Alternate the two paths so both see the same machine load."""
    visa, sock = [], []
    for _ in range(repeats):
        visa.append(_timed(visa_fn))
        sock.append(_timed(socket_fn))
    return visa, sock


def run_family(family: str, samples: int, repeats: int, naive: bool) -> None:
    bench = SimulatedBench(
        catalog={"PATTERN": None},
        fixture=types.SimpleNamespace(),
        capture_model=PatternCaptureModel(),
        families={"scope": family},
    )
    with bench:
        resource = bench.resources["scope"]
        host, port = resource.split("::")[1], int(resource.split("::")[2])
        scope = connect("scope", resource, family, timeout_s=30.0)
        wf = scope.table.waveform
        rng = np.random.default_rng(1)
        patterns = {
            "random codes": rng.integers(wf.code_min, wf.code_max + 1, samples),
            "flat at code 10": np.full(samples, 10),
        }
        for label, codes in patterns.items():
            bench.scope.store_trace(1, codes, 1.0, 0.0, wf.code_min, wf.code_max, 0.0, 1e-9)
            nbytes = samples * (1 if wf.sample_format == "int8" else 2)
            trace = scope.read_channel(1)  # warm-up and correctness check
            assert np.array_equal(trace.codes, codes.astype(np.int16)), "transfer corrupted data"
            data_cmd = scope.table.format("waveform_data", channel=1)
            select = ([scope.table.format(wf.select_source, channel=1)]
                      if wf.select_source else [])

            def visa_path(cmd=data_cmd, sel=select):
                for c in sel:
                    scope.session.write(c)
                scope.session.query_block(cmd, terminator=wf.terminator_after_block)

            def socket_path(cmd=data_cmd, sel=select):
                plain_socket_read(host, port, [*sel, cmd], wf.terminator_after_block)

            visa, sock = paired_times(visa_path, socket_path, repeats)
            v_best, s_best = min(visa), min(sock)
            pair_ratio = statistics.median(s / v for v, s in zip(visa, sock, strict=True))
            print(f"{family:14s} {wf.sample_format:5s} {label:16s} {samples:>11,d} samples "
                  f"({nbytes / 1e6:5.1f} MB): pyvisa best {nbytes / v_best / 1e6:5.0f} MB/s, "
                  f"socket best {nbytes / s_best / 1e6:5.0f} MB/s; ratio of bests "
                  f"{s_best / v_best:4.2f}, median ratio of {repeats} interleaved pairs "
                  f"{pair_ratio:4.2f} (goal >= 0.5)")
        if naive:
            short = 200_000
            bench.scope.store_trace(1, np.full(short, 10), 1.0, 0.0, wf.code_min, wf.code_max,
                                    0.0, 1e-9)
            inst = scope.session._inst  # the raw pyvisa resource, terminator left on
            for c in select:
                inst.write(c)
            inst.write(data_cmd)
            t0 = time.perf_counter()
            nbytes = short * (1 if wf.sample_format == "int8" else 2)
            got = 0
            while got < nbytes:
                got += len(inst.read_raw())
            dt = time.perf_counter() - t0
            print(f"{family:14s} naive terminator-scanning read_raw of a flat code-10 trace "
                  f"({nbytes / 1e6:.1f} MB): {nbytes / dt / 1e6:.2f} MB/s")
        scope.session.close()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--samples", type=int, default=10_000_000)
    parser.add_argument("--repeats", type=int, default=9)
    parser.add_argument("--naive", action="store_true")
    args = parser.parse_args()
    load = os.getloadavg()[0]
    print(f"machine load average {load:.1f} on {os.cpu_count()} CPUs (figures are noisy when "
          "the load exceeds the CPU count)")
    for family in ("scope-generic", "scope-alt"):
        run_family(family, args.samples, args.repeats, args.naive)


if __name__ == "__main__":
    main()
