"""Units of the measurement chain: sound-card full scale to volts to g.

Pure. A :class:`ChainCalibration` converts the numbers the audio interface sees (full scale, FS,
where ±1.0 is the converter's limit) into physical units. The simulated rig knows its own truth;
a real card gets it from a calibration file (see ``calibration/``).
"""

from __future__ import annotations

from dataclasses import dataclass

from liveshape.dsp.profile import G0_M_S2


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
    """

    out_v_per_fs: float = 1.0
    in_v_per_fs: float = 1.0
    accel_mv_per_g: float = 100.0
    loop_delay_samples: int | None = None
    calibrated: bool = True
    source: str = ""

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
