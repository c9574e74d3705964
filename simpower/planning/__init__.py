"""Planning a study on top of the engine: grids of assumptions, the required size, runs to a target MCSE.

* :mod:`.sweep` -- grids of parameters (:class:`Grid`, :class:`Range`), one
  tidy row per grid point and analysis; the type I error check at each
  analysis's H0 boundary (:func:`null_check`);
* :mod:`.nullpoints` -- where each analysis's H0 boundary puts the process's effect;
* :mod:`.search` -- the smallest size (or the detectable effect) for a target
  power, with a Monte Carlo interval;
* :mod:`.sequential` -- runs until the power's MCSE reaches a target, and the
  point keys that make the same parameters give the same numbers anywhere;
* :mod:`.battery` -- the self-check battery of ``simpower check``: simulated
  power against the exact closed forms over a grid of textbook cases.

Arrows point one way: planning imports the engine, the engine never imports planning.
"""
