"""Pure computation: numpy/scipy only, SI units, no I/O, imports nothing else of phaseward."""
