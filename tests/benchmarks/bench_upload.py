"""Upload throughput of the ``visa`` driver against a bare socket client (run by hand).

Both upload the same 2^24-sample int16 table (32 MiB) as one IEEE 488.2
definite-length block to the same virtual instrument (``sweepgen emulate`` in
its own process, as a real instrument would be) on a loopback socket, and
both time from the first byte of the upload command to the answer of the
completion query (``*OPC?``), so the instrument's own work is in both. The
two are interleaved and the best of N runs of each is compared.
The driver goes through pyvisa's pure-Python backend and the generator
profile's templates; the baseline writes the bytes with ``socket.sendall``.
The table's codes are computed before timing, so only the transfer is measured.

    python tests/benchmarks/bench_upload.py [--repeat N] [--log2 N]

Prints both throughputs and their ratio (driver / bare socket; the aim is >= 0.8).
"""

from __future__ import annotations

import argparse
import socket
import subprocess
import sys
import time

import numpy as np

from sweepgen.wire import block
from sweepgen.drivers.base import Delivery
from sweepgen.drivers.visa import VisaDriver
from sweepgen.generator import load_generator
from sweepgen.table import Frame, RenderedTable, TableInfo


def make_table(count: int, rate: float) -> RenderedTable:
    codes = ((np.arange(count, dtype=np.int64) * 7) % 16001 - 8000).astype("<i2")   # demo data
    info = TableInfo(sample_rate=rate, count=count, period_count=count, dtype="<i2", output="voltage",
                     drive_unit="V", code_scale=1e-3, code_offset=0.0, amplitude=2.0, offset=0.0)
    empty = np.empty(0)

    def frames(start, stop):
        return Frame(start, empty, empty, empty, codes[start:stop])

    return RenderedTable(info, frames), codes


def read_line(sock) -> bytes:
    data = b""
    while not data.endswith(b"\n"):
        piece = sock.recv(4096)
        if not piece:
            raise ConnectionError("instrument closed the connection")
        data += piece
    return data


class Emulator:
    """``sweepgen emulate --port 0`` in a child process; ``resource``, ``host``, ``port``."""

    def __enter__(self):
        self.proc = subprocess.Popen([sys.executable, "-m", "sweepgen", "emulate", "--port", "0"],
                                     stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
        self.resource = self.proc.stdout.readline().strip()
        _, self.host, port, _ = self.resource.split("::")
        self.port = int(port)
        return self

    def __exit__(self, *exc):
        self.proc.terminate()
        self.proc.wait(10)


def bare_socket(server, codes: np.ndarray) -> float:
    host, port = server.host, server.port
    with socket.create_connection((host, port)) as sock:
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        sock.sendall(b"FORM:DATA INT,16;:FORM:BORD SWAP\n")
        payload = memoryview(codes).cast("B")
        t0 = time.perf_counter()
        sock.sendall(b"TRAC:DATA SWEEP," + block.block_header(payload.nbytes))
        sock.sendall(payload)
        sock.sendall(b"\n*OPC?\n")
        reply = read_line(sock)
        elapsed = time.perf_counter() - t0
        sock.sendall(b"SYST:ERR?\n")
        error = read_line(sock)
    assert reply.strip() == b"1" and error.startswith(b"0,"), (reply, error)
    return elapsed


def driver(server, table, generator) -> float:
    delivery = Delivery(destination=server.resource, generator=generator, options={"verify": "none"})
    report = VisaDriver().deliver(table, delivery)
    steps = {s["step"]: s["duration"] for s in report["steps"]}
    return steps["upload"] + steps["wait"]


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--log2", type=int, default=24, help="table length as a power of two (default 24)")
    args = parser.parse_args()
    generator = load_generator("virtual-awg")
    count = 1 << args.log2
    table, codes = make_table(count, 10e6)
    nbytes = codes.nbytes
    with Emulator() as server:
        bare_times, driver_times = [], []
        for _ in range(args.repeat):            # interleaved, so drifts hit both alike
            bare_times.append(bare_socket(server, codes))
            driver_times.append(driver(server, table, generator))
    bare, drv = min(bare_times), min(driver_times)
    print(f"table: {count} samples, {nbytes / 2**20:.1f} MiB; best of {args.repeat}")
    print(f"bare socket : {bare * 1e3:8.1f} ms  {nbytes / bare / 1e6:8.1f} MB/s")
    print(f"visa driver : {drv * 1e3:8.1f} ms  {nbytes / drv / 1e6:8.1f} MB/s")
    print(f"ratio (driver / bare socket throughput): {bare / drv:.2f}")


if __name__ == "__main__":
    main()
