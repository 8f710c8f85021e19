"""A model that pokes at every capability WASI could give it, for the WASI
policy tests (tests/wasi.rs). It reports what it found as outputs; it is
never a real model. Built with componentize-py by `cargo xtask build`."""

import os
import sys
import time

import wit_world
from wit_world import Bounds, Contract, Domain_Real, Feature, Output

OUTPUTS = [
    ("env_vars", "environment variables visible"),
    ("args", "command-line arguments visible"),
    ("files", "1 when it could list the root directory or open a file"),
    ("network", "1 when it could open a socket"),
    ("wall_clock", "wall-clock time, seconds since the Unix epoch"),
    ("random", "first four random bytes as a number"),
    ("slept_ms", "milliseconds the monotonic clock moved over the sleep"),
]


def can(action):
    try:
        action()
        return 1.0
    except BaseException:
        return 0.0


def open_socket():
    import socket

    socket.create_connection(("127.0.0.1", 7340), timeout=0.01)


def touch_files():
    for attempt in (lambda: os.listdir("/"), lambda: open("/etc/passwd").read(), lambda: open("probe.txt", "w")):
        try:
            attempt()
            return
        except BaseException:
            pass
    raise OSError("no file reachable")


class WitWorld(wit_world.WitWorld):
    def init(self, params: bytes) -> None:
        # Packed with the params `quiet`, init prints nothing: tests/prime.rs
        # primes that probe (a model that prints from init is not primed).
        if params != b"quiet":
            print("probe: started")

    def describe(self) -> Contract:
        any_ = Bounds(None, None)
        return Contract(
            "wasi-probe",
            "0.1.0",
            [Feature("sleep_ms", Domain_Real(Bounds(0.0, None)), "ms", True, "how long to sleep"),
             Feature("print_bytes", Domain_Real(Bounds(0.0, None)), "bytes", True, "how much to print")],
            [Output(name, None, any_, about) for name, about in OUTPUTS],
            "Reports which capabilities WASI gives it.",
        )

    def score(self, rows: int, cells):
        out = []
        for r in range(rows):
            sleep_ms, print_bytes = cells[2 * r], cells[2 * r + 1]
            sys.stdout.write("x" * int(print_bytes))
            sys.stdout.flush()
            before = time.monotonic()
            if sleep_ms > 0:
                time.sleep(sleep_ms / 1000.0)
            slept = (time.monotonic() - before) * 1000.0
            out += [
                float(len(os.environ)),
                float(len(sys.argv)),
                can(touch_files),
                can(open_socket),
                time.time(),
                float(int.from_bytes(os.urandom(4), "big")),
                slept,
            ]
        return out
