"""The control loop, pure of I/O: response blocks in, drive blocks out.

The block-driven :class:`~liveshape.control.controller.Controller` and its state
(:mod:`.loopstate`, :mod:`.runstate`), the estimation stages (:mod:`.stages`, :mod:`.connect`),
the drive side (:mod:`.drivestream`), the update laws (:mod:`.equalizer`), the level schedule
(:mod:`.schedule`), the safety supervisor (:mod:`.safety`) and what ``check`` reports
(:mod:`.checks`). Imports :mod:`liveshape.dsp` and :mod:`liveshape.testdef` only.
"""
