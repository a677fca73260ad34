"""sweepgen: plan, check, simulate and play frequency-chirped slowing sweeps.

The public API is what this package exports (``sweepgen.__all__``): the
functions of :mod:`sweepgen.api`, the result objects of
:mod:`sweepgen.results`, the errors of :mod:`sweepgen.errors` and the
emulators of :mod:`sweepgen.testing`. They are imported on first use, so that
``import sweepgen`` and ``sweepgen --help`` stay fast. Every other module is
internal and may change between versions (DEVELOPERS.md: which modules are
public)::

    import sweepgen

    p = sweepgen.plan("rb87-chopped-oven")
    p.chirp_duration                  # s
    sweepgen.check("rb87-chopped-oven").ok

The package is organised along the flow of the job (see DEVELOPERS.md):
scenario files are loaded and validated once (units become SI floats), the
planner turns the physics into a design trajectory and a schedule of optical
detuning versus time, the tuning chain maps detuning to the drive of the
actuator, the checker proves the sweep is safe and playable, the renderer turns
it into generator codes and the drivers deliver those codes.
"""

from __future__ import annotations

import importlib
import sys
import types
from typing import TYPE_CHECKING

__version__ = "0.1.0"

#: public name -> module it lives in (imported on first use)
_PUBLIC = {
    **{name: "sweepgen.api" for name in ("load_scenario", "scenario_dict", "plan", "check", "simulate", "render",
                                         "export", "upload", "calibrate", "inspect", "compare", "scan",
                                         "optimise")},
    **{name: "sweepgen.results" for name in ("Result", "PlanResult", "CheckResult", "SimulationResult",
                                             "ExportResult", "UploadResult", "CalibrationResult", "InspectResult",
                                             "CompareResult", "ScanResult", "OptimiseResult")},
    **{name: "sweepgen.errors" for name in ("SweepgenError", "InputError", "PlanError", "CheckFailed",
                                            "InstrumentError", "DriverError", "DeprecatedKey")},
    "Scenario": "sweepgen.scenario",
    "testing": "sweepgen.testing",
}

__all__ = ["__version__", *_PUBLIC]

if TYPE_CHECKING:  # pragma: no cover - for type checkers and editors only
    from sweepgen import testing
    from sweepgen.api import (calibrate, check, compare, export, inspect, load_scenario, optimise, plan,
                              render, scan, scenario_dict, simulate, upload)
    from sweepgen.errors import (CheckFailed, DeprecatedKey, DriverError, InputError, InstrumentError, PlanError,
                                 SweepgenError)
    from sweepgen.results import (CalibrationResult, CheckResult, CompareResult, ExportResult, InspectResult,
                                  OptimiseResult, PlanResult, Result, ScanResult, SimulationResult, UploadResult)
    from sweepgen.scenario import Scenario


class _Package(types.ModuleType):
    """The package's module type: five public functions share their name with an internal module
    (``simulate``, ``render``, ``compare``, ``scan``, ``optimise``); importing that module must not hide
    the function, so ``sweepgen.simulate`` stays the function (internal code imports from the module:
    ``from sweepgen.simulate import ...`` or ``importlib.import_module("sweepgen.scan")``)."""

    def __setattr__(self, name, value):
        if isinstance(value, types.ModuleType) and _PUBLIC.get(name) == "sweepgen.api":
            return
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Package


def __getattr__(name: str):
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module 'sweepgen' has no attribute {name!r}")
    if name == "testing":
        value = importlib.import_module(module)
    else:
        value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_PUBLIC))
