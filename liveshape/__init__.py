"""liveshape: closed-loop random-vibration control of small shakers through an audio interface.

The package is a functional core (profiles, synthesis, spectra, equalizer, safety rules: pure
numpy/scipy) with a thin shell (YAML reading, the terminal dashboard, the command line and the
audio rigs). See DEVELOPERS.md for the architecture map.
"""

__version__ = "0.1.0"
