"""Units of the measurement chain: sound-card full scale to volts to g.

Pure. A :class:`ChainCalibration` converts the numbers the audio interface sees (full scale, FS,
where ±1.0 is the converter's limit) into physical units. The simulated rig knows its own truth;
a real card gets it from a calibration file (see ``calibration/``).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

from liveshape.dsp.profile import G0_M_S2


@dataclass(frozen=True)
class InputChannelCal:
    """The conversion factors of one input channel of a rig with several inputs.

    Parameters
    ----------
    channel : int
        Input channel, counted from 1 as printed on the interface.
    v_per_fs : float
        Input volts per unit full scale on this channel.
    mv_per_g : float or None
        Sensitivity of the accelerometer on this channel with its conditioner, mV per g; None
        for an input without one (a loopback of the drive, read in volts).
    """

    channel: int
    v_per_fs: float
    mv_per_g: float | None = None


@dataclass(frozen=True)
class ChainCalibration:
    """Conversion factors of one drive/control chain.

    Parameters
    ----------
    out_v_per_fs : float
        Output volts (peak, i.e. instantaneous) per unit full scale at the interface output.
    in_v_per_fs : float
        Input volts per unit full scale at the interface input.
    accel_mv_per_g : float
        Sensitivity of the control accelerometer with its conditioner, mV per g
        (g = 9.80665 m/s²).
    loop_delay_samples : int or None
        Measured round-trip delay, output to input, in samples (None: measure at run start).
    calibrated : bool
        False when the user ran with levels declared uncalibrated; the record says so.
    source : str
        Where the numbers came from (a file path, ``sim:<preset>``, ``uncalibrated``).
    inputs : tuple of InputChannelCal
        Per-input factors of a rig with several inputs, by channel (empty: every input uses
        ``in_v_per_fs`` and ``accel_mv_per_g``); see :meth:`for_input`.
    """

    out_v_per_fs: float = 1.0
    in_v_per_fs: float = 1.0
    accel_mv_per_g: float = 100.0
    loop_delay_samples: int | None = None
    calibrated: bool = True
    source: str = ""
    inputs: tuple[InputChannelCal, ...] = ()

    def input_cal(self, channel: int) -> InputChannelCal:
        """The factors of input ``channel`` (counted from 1): its own entry, else the chain's
        ``in_v_per_fs`` and ``accel_mv_per_g``."""
        for c in self.inputs:
            if c.channel == channel:
                return c
        return InputChannelCal(int(channel), self.in_v_per_fs, self.accel_mv_per_g)

    def for_input(self, channel: int) -> ChainCalibration:
        """The one-input chain of input ``channel``: this chain with that input's V/FS and mV/g
        (an input without an accelerometer keeps the chain's mV/g; use :meth:`volts_per_fs_at`
        and :meth:`drive_fs_per_input_fs` for it)."""
        c = self.input_cal(channel)
        mv = self.accel_mv_per_g if c.mv_per_g is None else c.mv_per_g
        return dataclasses.replace(self, in_v_per_fs=c.v_per_fs, accel_mv_per_g=mv)

    def g_per_fs_at(self, channel: int) -> float:
        """Acceleration in g per unit full scale at input ``channel``.

        Raises
        ------
        ValueError
            The input has no accelerometer (its entry gives no ``mv_per_g``).
        """
        c = self.input_cal(channel)
        if c.mv_per_g is None:
            raise ValueError(f"input {channel} has no accelerometer sensitivity (mv_per_g)")
        return c.v_per_fs / (c.mv_per_g * 1e-3)

    def volts_per_fs_at(self, channel: int) -> float:
        """Input volts per unit full scale at input ``channel``."""
        return self.input_cal(channel).v_per_fs

    def drive_fs_per_input_fs(self, channel: int) -> float:
        """Drive full scale (at the output) per unit full scale read at input ``channel`` through
        a loopback cable: ``in_v_per_fs(channel) / out_v_per_fs`` (a cable passes volts)."""
        return self.input_cal(channel).v_per_fs / self.out_v_per_fs

    @property
    def g_per_fs(self) -> float:
        """Acceleration in g per unit full scale at the input."""
        return self.in_v_per_fs / (self.accel_mv_per_g * 1e-3)

    @property
    def fs_per_g(self) -> float:
        """Input full scale per g."""
        return 1.0 / self.g_per_fs


@dataclass(frozen=True)
class AccelUnit:
    """A unit in which acceleration figures are shown (the record always holds g).

    Parameters
    ----------
    key : str
        The name on the command line: ``g`` or ``m/s2``.
    per_g : float
        Amplitude in this unit per g (9.80665 for m/s²: the standard acceleration of gravity,
        3rd CGPM, 1901). An ASD scales by ``per_g**2``.
    amplitude : str
        Label of an amplitude (rms, peak): ``g`` or ``m/s²``.
    asd : str
        Label of an ASD: ``g²/Hz`` or ``(m/s²)²/Hz``.
    """

    key: str
    per_g: float
    amplitude: str
    asd: str

    @property
    def rms(self) -> str:
        """Label of an rms figure: ``g rms`` or ``m/s² rms``."""
        return f"{self.amplitude} rms"


#: The display units of acceleration, by command-line name.
ACCEL_UNITS: dict[str, AccelUnit] = {
    "g": AccelUnit("g", 1.0, "g", "g²/Hz"),
    "m/s2": AccelUnit("m/s2", G0_M_S2, "m/s²", "(m/s²)²/Hz"),
}
G_UNIT = ACCEL_UNITS["g"]
