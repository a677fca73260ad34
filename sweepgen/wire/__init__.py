"""The wire codecs: how bytes on a link to a generator are laid out.

* :mod:`sweepgen.wire.block` -- IEEE 488.2 definite-length arbitrary blocks;
* :mod:`sweepgen.wire.scpi` -- SCPI program data and replies (numbers, lists,
  data formats, error-queue replies);
* :mod:`sweepgen.wire.frames` -- the serial ramp-board frame protocol
  (specified in ``drivers/serial_protocol.md``).

Pure functions and small data classes, no I/O: the drivers (host side) and
the emulators (instrument and board side) both build on them. The SCPI
commands themselves are the generator profile's templates
(:mod:`sweepgen.dialect`), not part of the wire.
"""
