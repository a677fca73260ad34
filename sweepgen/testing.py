"""Helpers for tests and dry runs: the virtual instrument in-process, on a real socket.

Everything here runs the real components: a :class:`sweepgen.emulators.instrument.InstrumentServer`
listening on a free loopback port, reached through pyvisa's pure-Python backend
with the resource string ``TCPIP::127.0.0.1::<port>::SOCKET``. Use them in your
own tests of profiles and scenarios::

    from sweepgen.testing import virtual_instrument

    with virtual_instrument("my-awg.toml") as resource:
        ...  # pyvisa.ResourceManager("@py").open_resource(resource, ...)

or upload a rendered table and get the driver's report in one line::

    report = upload_to_virtual_instrument(table, generator)

The serial ramp-board emulator likewise: ``with virtual_board() as url:`` yields
a ``socket://127.0.0.1:<port>`` URL for the ``serial`` driver.
"""

from __future__ import annotations

import contextlib
import os
from typing import Iterator


def _generator(generator):
    if isinstance(generator, (str, bytes)) or hasattr(generator, "__fspath__"):
        from sweepgen.generator import load_generator

        return load_generator(os.fsdecode(generator))       # str(b"x") would be "b'x'"
    return generator


@contextlib.contextmanager
def instrument_server(generator="virtual-awg", *, faults=None, identity: str | None = None,
                      host: str = "127.0.0.1", port: int = 0, max_line: int | None = None,
                      **server_options) -> Iterator:
    """Serve a virtual instrument in a background thread; yield the running server.

    ``generator`` is a loaded :class:`sweepgen.generator.Generator`, a built-in
    key or a path to a profile; its limits are the instrument's. The server has
    ``resource`` (VISA resource string), ``instrument`` (the
    :class:`sweepgen.emulators.instrument.VirtualInstrument`, to inspect its state) and
    stops when the block ends. ``server_options`` go to the server
    (``max_connections``, ``idle_timeout``, ``log``).
    """
    from sweepgen.emulators.instrument import InstrumentServer, VirtualInstrument

    instrument = VirtualInstrument(_generator(generator), faults=faults, identity=identity, max_line=max_line)
    server = InstrumentServer(instrument, host, port, **server_options)
    server.start()
    try:
        yield server
    finally:
        server.stop()


@contextlib.contextmanager
def virtual_instrument(generator="virtual-awg", **kwargs) -> Iterator[str]:
    """Serve a virtual instrument on a free loopback port; yield its VISA resource string."""
    with instrument_server(generator, **kwargs) as server:
        yield server.resource


def upload_to_virtual_instrument(table, generator="virtual-awg", *, arm: bool = False, faults=None,
                                 options: dict | None = None, progress=None) -> dict:
    """Upload ``table`` with the ``visa`` driver to an in-process virtual instrument.

    Starts the instrument (limits from ``generator``), runs the whole upload
    sequence over a real loopback socket, stops the instrument, and returns the
    driver's report (``verification["ok"]`` tells whether the stored trace
    matched). Raises :class:`sweepgen.errors.InstrumentError` like a real upload.
    """
    from sweepgen.drivers.base import Delivery
    from sweepgen.drivers.visa import VisaDriver

    gen = _generator(generator)
    with instrument_server(gen, faults=faults) as server:
        delivery = Delivery(destination=server.resource, generator=gen, arm=arm, progress=progress,
                            options=dict(options or {}))
        report = VisaDriver().deliver(table, delivery)
        report["instrument"] = {"outputs_on": server.instrument.outputs_on,
                                "traces": sorted(server.instrument.traces)}
    return report


class BoardURL(str):
    """The ``socket://127.0.0.1:PORT`` URL of a running ramp-board emulator.

    A plain string (pass it wherever a pyserial URL goes) that also carries the
    emulator: ``.board`` (:class:`sweepgen.emulators.board.BoardEmulator`, e.g.
    ``.board.committed``) and ``.server`` (:class:`sweepgen.emulators.board.BoardServer`).
    """

    board = None
    server = None


@contextlib.contextmanager
def virtual_board(generator="demo-ramp-board", *, faults: dict | None = None, host: str = "127.0.0.1",
                  port: int = 0, **board_options) -> Iterator[BoardURL]:
    """Serve the ramp-board emulator on a free loopback port; yield its pyserial URL.

    ``generator`` is a loaded generator profile, a built-in key or a path;
    ``faults`` are the emulator's fault switches (see :mod:`sweepgen.emulators.board`)::

        with virtual_board("demo-ramp-board") as url:
            SerialDriver().deliver(table, Delivery(url, generator))
            assert url.board.committed.crc == table.crc32
    """
    from sweepgen.emulators.board import BoardServer

    server = BoardServer(_generator(generator), host=host, port=port, faults=faults, **board_options)
    server.start()
    try:
        url = BoardURL(server.url)
        url.board = server.board
        url.server = server
        yield url
    finally:
        server.stop()
