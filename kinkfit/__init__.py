"""kinkfit: planet posteriors from kinks in protoplanetary-disk line cubes.

The package is layered; earlier layers never import later ones:

1. ``kinkfit.constants``, ``kinkfit.errors``  -- plain floats, exceptions
2. physics core (pure functions): ``kinkfit.geometry``, ``kinkfit.wake.*``
3. data I/O: ``kinkfit.cube`` (FITS reader/writer), ``kinkfit.synth``
4. measurement: ``kinkfit.trace``, ``kinkfit.diskfit``, ``kinkfit.deviations``
5. inference: ``kinkfit.params``, ``kinkfit.priors``, ``kinkfit.likelihood``,
   ``kinkfit.sampling``
6. products: ``kinkfit.results`` (HDF5), ``kinkfit.plots``, ``kinkfit.report``
7. ``kinkfit.config`` (TOML -> frozen dataclasses) and ``kinkfit.cli``
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
