"""Tests of liveshape.dsp.frames: one random-phase frame against scipy and the chi-square law.

Statistical checks fail by chance with probability ``P_FAIL`` (seeds are fixed, so results are
reproducible).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.fft
from scipy import signal, stats

from liveshape.dsp import frames
from liveshape.dsp.frames import irfft_into, random_phase_frame, rfft_into, sine_window

P_FAIL = 1e-4  # chance of a false failure per statistical check


def white_psd(n_lines: int, level: float = 1.0) -> np.ndarray:
    """Flat on every line but DC and Nyquist."""
    p = np.full(n_lines, level)
    p[0] = p[-1] = 0.0
    return p


def test_fixed_frame_periodogram_equals_target_exactly():
    fs, n = 1000.0, 128
    rng = np.random.default_rng(3)
    psd = rng.uniform(0.0, 2.0, n // 2 + 1)
    x = random_phase_frame(psd, fs, seed=rng, amplitudes="fixed")
    # scipy as reference: one-sided boxcar periodogram at the synthesis resolution
    f, pxx = signal.periodogram(x, fs, window="boxcar", detrend=False)
    assert np.allclose(pxx, psd, rtol=1e-10, atol=1e-14)
    # Parseval: mean square = sum(psd) * delta_f, exactly for one fixed-amplitude frame
    assert np.mean(x**2) == pytest.approx(psd.sum() * fs / n, rel=1e-12)


def test_rayleigh_frame_periodogram_scatters_as_chi2_two_dof():
    fs, n = 1000.0, 4096
    psd = white_psd(n // 2 + 1, 3.0)
    x = random_phase_frame(psd, fs, seed=11, amplitudes="rayleigh")
    _, pxx = signal.periodogram(x, fs, window="boxcar", detrend=False)
    ratio = pxx[1:-1] / psd[1:-1]
    # Bendat & Piersol: a raw periodogram line of a Gaussian process is chi-square with 2 DOF,
    # ratio ~ Exp(1); Kolmogorov-Smirnov test (scipy) at the P_FAIL level
    assert stats.kstest(ratio, "expon").pvalue > P_FAIL


def test_sine_window_is_power_complementary():
    # Princen-Bradley condition w(n)^2 + w(n + N/2)^2 = 1 [mem], exact for the sine window
    w = sine_window(512)
    assert np.allclose(w[:256] ** 2 + w[256:] ** 2, 1.0, atol=1e-15)


@pytest.mark.parametrize("binding", [True, False])
@pytest.mark.parametrize("n", [8, 127, 8192])
def test_real_ffts_into_arrays_equal_scipy_fft(binding, n, monkeypatch):
    if not binding:  # the fallback when scipy's pocketfft binding is missing
        monkeypatch.setattr(frames, "_R2C", None)
        monkeypatch.setattr(frames, "_C2R", None)
    else:
        assert frames._R2C is not None  # the binding is there on this scipy
    rng = np.random.default_rng(n)
    x = rng.standard_normal((2, 3, n))
    out = np.empty((2, 3, n // 2 + 1), dtype=complex)
    # scipy.fft as reference: the same pocketfft transforms; rounding of an FFT is about
    # eps log2(n) of the largest value (Higham 2002, sec. 24.1), far below 1e-13
    ref = scipy.fft.rfft(x, axis=-1)
    assert rfft_into(x, out) is out
    np.testing.assert_allclose(out, ref, rtol=0, atol=1e-13 * np.abs(ref).max())
    part = np.empty((2, 2, n // 2 + 1), dtype=complex)[:, :1]  # a strided output
    rfft_into(x[:, 1:2], part)
    np.testing.assert_allclose(part, ref[:, 1:2], rtol=0, atol=1e-13 * np.abs(ref).max())
    y = np.empty((n, 3))
    coef = np.ascontiguousarray(np.moveaxis(ref[0], -1, 0))  # lines along axis 0
    assert irfft_into(coef, n, y, axis=0) is y
    np.testing.assert_allclose(y, scipy.fft.irfft(coef, n, axis=0), rtol=0, atol=1e-13)
    np.testing.assert_allclose(y.T, x[0], rtol=0, atol=1e-13)  # and back to x
