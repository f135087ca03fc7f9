"""Random-phase frames: the sine window, line scales and random Fourier coefficients.

Pure numpy. The building blocks of :class:`liveshape.dsp.synth.RandomPhaseSynth`, which windows and
overlap-adds such frames into a stream. A frame of ``N`` samples is the inverse real FFT of
coefficients on the lines ``f_hz = k * fs_hz / N`` (``k = 0 .. N // 2``) whose mean square per
line is ``psd * delta_f`` (Smallwood & Paez 1993):

``amplitudes="rayleigh"``
    Complex-Gaussian coefficients (Rayleigh amplitude, uniform phase): each frame is exactly
    Gaussian, with chi-square scatter (2 DOF per line) of its periodogram.
``amplitudes="fixed"``
    Fixed amplitudes ``sqrt(2 psd delta_f)`` (times ``N/2``) with uniform random phase: the
    periodogram of one unwindowed frame equals the target exactly, but the frame is
    sub-Gaussian, kurtosis ``3 - 1.5 sum a^4 / (sum a^2)^2`` (a sum of random-phase sines).

The DC and Nyquist lines are real: they get a real Gaussian (rayleigh) or a random sign (fixed)
of mean square ``psd * delta_f``, so the variance is ``sum(psd * delta_f)`` over all lines, the
convention of :func:`scipy.signal.welch` with ``return_onesided=True``.

References
----------
D. O. Smallwood and T. L. Paez, "A frequency domain method for the generation of partially
coherent normal stationary time domain signals", Shock and Vibration 1(1), 1993.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.fft as sp_fft

from liveshape.errors import ConfigError

__all__ = [
    "AMPLITUDES",
    "check_amplitudes",
    "draw_coefficients",
    "irfft_into",
    "line_scales",
    "random_phase_frame",
    "rfft_into",
    "sine_window",
]

AMPLITUDES = ("rayleigh", "fixed")


def _pocketfft_binding():
    """scipy's own pocketfft functions ``(r2c, c2r)`` if they are there and agree with scipy.fft.

    :mod:`scipy.fft` calls them after a dispatch layer that costs several microseconds a call,
    a fifth of an 8192-point transform; they also write into a given output array. They are not
    public, so they are used only after a check on a small transform, else scipy.fft is.
    """
    try:
        from scipy.fft._pocketfft import pypocketfft as pp

        x = np.array([1.0, -2.0, 0.5, 3.0, 0.0, 1.5])
        ref = sp_fft.rfft(x)
        ok = np.allclose(pp.r2c(x, (0,), True, 0, None, 1), ref, rtol=0.0, atol=1e-12)
        ok = ok and np.allclose(pp.c2r(ref, (0,), 6, False, 2, None, 1), x, rtol=0.0, atol=1e-12)
        if ok:
            return pp.r2c, pp.c2r
    except Exception:  # noqa: BLE001 - anything unexpected: fall back to scipy.fft
        pass
    return None, None


_R2C, _C2R = _pocketfft_binding()


def rfft_into(x: np.ndarray, out: np.ndarray) -> np.ndarray:
    """``scipy.fft.rfft(x, axis=-1)`` written into ``out`` (complex128, last axis ``n//2 + 1``).

    Returns ``out``. ``x`` is float64 of any shape; ``out`` must not overlap it.
    """
    if _R2C is not None:
        return _R2C(x, (x.ndim - 1,), True, 0, out, 1)
    out[...] = sp_fft.rfft(x, axis=-1)
    return out


def irfft_into(coef: np.ndarray, n: int, out: np.ndarray, *, axis: int = -1) -> np.ndarray:
    """``scipy.fft.irfft(coef, n, axis=axis)`` written into ``out`` (float64); returns ``out``.

    ``out`` has the shape of ``coef`` with ``n`` samples along ``axis`` and must not overlap it.
    """
    if _C2R is not None:
        return _C2R(coef, (axis % coef.ndim,), n, False, 2, out, 1)
    out[...] = sp_fft.irfft(coef, n, axis=axis)
    return out


def check_amplitudes(amplitudes: str) -> str:
    """``amplitudes`` if it is one of :data:`AMPLITUDES`, else a one-line ConfigError."""
    if amplitudes not in AMPLITUDES:
        raise ConfigError(
            f"synth: amplitudes = {amplitudes!r} is not one of {', '.join(AMPLITUDES)}"
        )
    return amplitudes


def sine_window(frame_length: int) -> np.ndarray:
    """The power-complementary sine window ``w(n) = sin(pi (n + 1/2) / N)``.

    At 50 % overlap ``w(n)^2 + w(n + N/2)^2 = 1`` for every ``n`` (Princen-Bradley condition).
    """
    n = np.arange(frame_length, dtype=np.float64)
    return np.sin(np.pi * (n + 0.5) / frame_length)


def line_scales(
    psd: np.ndarray,
    delta_f: float,
    amplitudes: str = "rayleigh",
    *,
    out_re: np.ndarray | None = None,
    out_im: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Scales of the real and imaginary parts of the Fourier coefficients of one frame.

    With ``N = 2 (len(psd) - 1)`` and ``x = irfft(X)``, line ``k`` (``0 < k < N/2``) contributes
    ``(2/N) Re(X_k e^{i 2 pi k n / N})``, of variance ``2 E|X_k|^2 / N^2``; setting it to
    ``psd_k * delta_f`` gives ``|X_k| = N sqrt(psd_k delta_f / 2)``. DC and Nyquist are real,
    ``X/N`` of variance ``psd delta_f``, so ``|X| = N sqrt(psd delta_f)``. For ``"rayleigh"`` the
    real and imaginary parts are standard normals times ``|X_k| / sqrt(2)``; for ``"fixed"``
    they are ``|X_k| cos(phi)`` and ``|X_k| sin(phi)``.

    Parameters
    ----------
    psd : ndarray
        One-sided PSD on the lines DC .. Nyquist, units^2/Hz.
    delta_f : float
        Line spacing, Hz.
    amplitudes : {"rayleigh", "fixed"}
    out_re, out_im : ndarray, optional
        Arrays of ``len(psd)`` to write into.

    Returns
    -------
    scale_re, scale_im : ndarray
    """
    p = np.asarray(psd, dtype=np.float64)
    n = 2 * (p.size - 1)
    re = np.empty(p.size) if out_re is None else out_re
    im = np.empty(p.size) if out_im is None else out_im
    np.multiply(p, delta_f / 2.0, out=re)
    np.sqrt(re, out=re)
    re *= n
    for k in (0, p.size - 1):
        re[k] = n * math.sqrt(p[k] * delta_f)
    if amplitudes == "rayleigh":
        re[1:-1] /= math.sqrt(2.0)
    im[:] = re
    im[0] = 0.0
    im[-1] = 0.0
    return re, im


def draw_coefficients(
    rng: np.random.Generator,
    scale_re: np.ndarray,
    scale_im: np.ndarray,
    amplitudes: str = "rayleigh",
    *,
    real_lines: tuple[int, ...] = (0, -1),
    draw: np.ndarray | None = None,
    out: np.ndarray | None = None,
) -> np.ndarray:
    """Random Fourier coefficients of one frame (see :func:`line_scales`).

    ``"rayleigh"``: independent standard normals times the scales (complex Gaussian; the real DC
    and Nyquist lines a real Gaussian), drawn in the order re, im of each line in turn.
    ``"fixed"``: uniform phases, the real lines a random sign. ``2 len(scale_re)`` resp.
    ``len(scale_re)`` numbers are drawn whatever the levels.

    Parameters
    ----------
    rng : numpy.random.Generator
    scale_re, scale_im : ndarray
        From :func:`line_scales` (or a slice of them).
    amplitudes : {"rayleigh", "fixed"}
    real_lines : tuple of int, optional
        Indices (into the arrays given) of the real DC and Nyquist lines, if they are included.
    draw : ndarray, optional
        Work array of shape ``(2, len(scale_re))``.
    out : ndarray, optional
        complex128 array of ``len(scale_re)`` to write into.
    """
    m = scale_re.size
    work = np.empty((2, m)) if draw is None else draw
    coef = np.empty(m, dtype=np.complex128) if out is None else out
    re, im = coef.real, coef.imag
    if amplitudes == "rayleigh":
        flat = work.reshape(-1)  # drawn as re, im interleaved (the synthesizer's order)
        rng.standard_normal(out=flat)
        np.multiply(flat[0::2], scale_re, out=re)
        np.multiply(flat[1::2], scale_im, out=im)
    else:
        u = work[0]
        rng.random(out=u)
        u *= 2.0 * np.pi
        np.cos(u, out=work[1])
        np.multiply(work[1], scale_re, out=re)
        np.sin(u, out=work[1])
        np.multiply(work[1], scale_im, out=im)
        for k in real_lines:  # real lines: a random sign
            re[k] = scale_re[k] if u[k] < np.pi else -scale_re[k]
    return coef


def random_phase_frame(
    psd: np.ndarray,
    fs_hz: float,
    *,
    seed: int | np.random.Generator | None = None,
    amplitudes: str = "rayleigh",
) -> np.ndarray:
    """One unwindowed random-phase frame of ``N = 2 (len(psd) - 1)`` samples.

    The building block of :class:`RandomPhaseSynth` (which windows and overlap-adds such frames).
    With ``"fixed"`` amplitudes the frame's periodogram equals ``psd`` exactly and its mean square
    is ``sum(psd) * fs_hz / N`` (Parseval).
    """
    check_amplitudes(amplitudes)
    p = np.asarray(psd, dtype=np.float64)
    n = 2 * (p.size - 1)
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    re, im = line_scales(p, fs_hz / n, amplitudes)
    return np.fft.irfft(draw_coefficients(rng, re, im, amplitudes), n=n)
