"""sweepgen: plan, check, simulate and play frequency-chirped slowing sweeps.

The package is organised along the flow of the job (see DEVELOPERS.md):
scenario files are loaded and validated once (units become SI floats), the
planner turns the physics into a design trajectory and a :class:`Schedule` of
optical detuning versus time, the tuning chain maps detuning to the drive of the
actuator, the checker proves the sweep is safe and playable, the renderer turns
it into generator codes and the drivers deliver those codes.
"""

__version__ = "0.1.0"
