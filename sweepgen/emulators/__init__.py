"""The emulators: a virtual SCPI instrument and a ramp board, on real loopback sockets.

* :mod:`sweepgen.emulators.instrument` -- the virtual arbitrary-waveform
  generator (IEEE 488.2 and standard SCPI on a TCP socket, reached through
  VISA), with its fault switches;
* :mod:`sweepgen.emulators.board` -- the ramp board speaking the serial frame
  protocol (on a pseudo-terminal or a TCP socket, reached through pyserial),
  with its fault switches.

Both take their limits from a generator profile and serve through one
loopback-server base (:mod:`sweepgen.emulators._server`). ``sweepgen emulate``
runs them as servers; :mod:`sweepgen.testing` runs them in-process for tests,
the demo and dry runs.
"""
