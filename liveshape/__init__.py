"""liveshape: closed-loop random-vibration control of small shakers through an audio interface.

The package is a functional core with a thin shell; the folders name the layers (see
DEVELOPERS.md for the rules a test enforces):

``dsp``      numpy/scipy only: profile arithmetic, synthesis, streaming Welch spectra, statistics
``testdef``  what a test is: the test definition, profiles and tolerances read from files
``control``  the loop, pure of I/O: controller, stages, equalizer, schedule, safety supervisor
``rigs``     what the controller drives: simulated plant, JACK virtual rig, sound card, calibration
``record``   what a run leaves: run folder writer and reader, streamed WAV, report, drive files
``views``    what a person sees: text rows, the character plot, the rich dashboard
``cli``, ``session``, ``errors``, ``schema``, ``atomic``   the shell and the shared leaves

The public API for scripts is this list, importable from the package itself (loaded on first
use, so ``import liveshape`` stays light)::

    from liveshape import Profile, load_spec, RandomPhaseSynth, welch_psd, Controller, SimRig

======================  ===========================================================
name                    where it lives
======================  ===========================================================
``Profile``             :class:`liveshape.dsp.profile.Profile`
``G0_M_S2``             :data:`liveshape.dsp.profile.G0_M_S2`
``profile_from_points`` :func:`liveshape.testdef.profilefile.profile_from_points`
``read_profile_csv``    :func:`liveshape.testdef.profilefile.read_profile_csv`
``Tolerance``           :class:`liveshape.testdef.tolerance.Tolerance`
``miles_grms``          :func:`liveshape.dsp.response.miles_grms`
``RandomPhaseSynth``    :class:`liveshape.dsp.synth.RandomPhaseSynth`
``welch_psd``           :func:`liveshape.dsp.spectra.welch_psd`
``CrossSpectrum``       :class:`liveshape.dsp.spectra.CrossSpectrum`
``TestSpec``            :class:`liveshape.testdef.spec.TestSpec`
``load_spec``           :func:`liveshape.testdef.spec.load_spec`
``ChainCalibration``    :class:`liveshape.testdef.chain.ChainCalibration`
``Controller``          :class:`liveshape.control.controller.Controller`
``SimRig``              :class:`liveshape.rigs.sim.SimRig`
``load_plant``          :func:`liveshape.rigs.plant.load_plant`
``load_run``            :func:`liveshape.record.runfolder.load_run`
======================  ===========================================================

The modules users script with most are reachable by their old short names too:
``from liveshape import profile, synth, spectra, spec`` gives :mod:`liveshape.dsp.profile`,
:mod:`liveshape.dsp.synth`, :mod:`liveshape.dsp.spectra` and :mod:`liveshape.testdef.spec`.
"""

from __future__ import annotations

import importlib
from typing import Any

__version__ = "0.1.0"

#: public name -> module that defines it
PUBLIC_API: dict[str, str] = {
    "Profile": "liveshape.dsp.profile",
    "G0_M_S2": "liveshape.dsp.profile",
    "profile_from_points": "liveshape.testdef.profilefile",
    "read_profile_csv": "liveshape.testdef.profilefile",
    "Tolerance": "liveshape.testdef.tolerance",
    "miles_grms": "liveshape.dsp.response",
    "RandomPhaseSynth": "liveshape.dsp.synth",
    "welch_psd": "liveshape.dsp.spectra",
    "CrossSpectrum": "liveshape.dsp.spectra",
    "TestSpec": "liveshape.testdef.spec",
    "load_spec": "liveshape.testdef.spec",
    "ChainCalibration": "liveshape.testdef.chain",
    "Controller": "liveshape.control.controller",
    "SimRig": "liveshape.rigs.sim",
    "load_plant": "liveshape.rigs.plant",
    "load_run": "liveshape.record.runfolder",
}

#: short module name -> module, for scripts written against the flat layout
PUBLIC_MODULES: dict[str, str] = {
    "profile": "liveshape.dsp.profile",
    "synth": "liveshape.dsp.synth",
    "spectra": "liveshape.dsp.spectra",
    "spec": "liveshape.testdef.spec",
}

__all__ = ["__version__", *PUBLIC_API, *PUBLIC_MODULES]


def __getattr__(name: str) -> Any:
    """Load a public name on first use (PEP 562)."""
    if name in PUBLIC_API:
        value = getattr(importlib.import_module(PUBLIC_API[name]), name)
    elif name in PUBLIC_MODULES:
        value = importlib.import_module(PUBLIC_MODULES[name])
    else:
        raise AttributeError(f"module 'liveshape' has no attribute {name!r}")
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
