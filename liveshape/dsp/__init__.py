"""Signal processing: numpy and scipy only, arrays in, arrays or frozen results out.

Profile arithmetic (:mod:`.profile`), the random-phase synthesizer (:mod:`.synth`, :mod:`.frames`,
:mod:`.ramp`, :mod:`.moments`), streaming Welch spectra and their statistics (:mod:`.spectra`,
:mod:`.welch_stream`, :mod:`.spectral_stats`), the loop-delay estimate (:mod:`.delay`) and the
single-degree-of-freedom response (:mod:`.response`). Imports no other liveshape subpackage.
"""
