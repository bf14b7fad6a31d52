"""liftmag: multi-microphone dialogue cleaning with linear and lifted magnitude estimators.

The package lives in ``dsp/liftmag/``; ``dsp/`` is the source root.
The DSP core (geometry, lift, estimators, patterns, engine) is pure numpy/scipy:
arrays in, arrays out, no I/O. Command-line verbs live in ``liftmag.commands``.
"""

__version__ = "0.1.0"
