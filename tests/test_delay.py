"""Tests of liveshape.dsp.delay: the loop delay from the cross-correlation peak.

Delays are exact by construction (zero-padded shifts, DFT-shift fractional delays); the outside
facts are named beside each check.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal as sig

from liveshape.dsp.delay import DelayEstimate, estimate_delay
from liveshape.errors import ConfigError


@pytest.mark.parametrize("delay", [0, 1, 37, 480])
@pytest.mark.parametrize("plant", ["fir", "iir", "inverted"])
def test_estimate_delay_integer_through_filter(delay, plant):
    rng = np.random.default_rng(10 + delay)
    x = rng.standard_normal(8000)
    # impulse responses whose largest tap is the first: the correlation peak of white noise
    # through h delayed by D sits at D (cross-correlation of white input = impulse response,
    # Bendat & Piersol)
    if plant == "fir":
        h = sig.lfilter([1.0, 0.6, -0.3, 0.1], [1.0], x)
    elif plant == "iir":
        h = sig.lfilter([1.0], [1.0, -0.7], x)
    else:
        h = -sig.lfilter([1.0, 0.4], [1.0], x)
    y = np.concatenate((np.zeros(delay), h[: x.size - delay]))
    y += 0.2 * rng.standard_normal(x.size)
    est = estimate_delay(x, y, max_lag=600)
    assert isinstance(est, DelayEstimate)
    assert est.samples == delay
    assert abs(est.fraction) <= 0.5
    assert (est.peak < 0) == (plant == "inverted")


@pytest.mark.parametrize("tau", [10.0, 10.1, 10.3, 10.5, 10.7])
def test_estimate_delay_sub_sample_fraction(tau):
    rng = np.random.default_rng(11)
    x = sig.lfilter(sig.firwin(101, 0.2), [1.0], rng.standard_normal(20_000))
    f = np.fft.rfftfreq(x.size)
    # exact fractional delay of the periodic record: phase shift exp(-j 2 pi f tau) (DFT shift
    # theorem)
    y = np.fft.irfft(np.fft.rfft(x) * np.exp(-2j * np.pi * f * tau), x.size)
    est = estimate_delay(x, y, max_lag=50)
    assert abs(est.samples - tau) <= 0.5
    # common practice: a parabola through the correlation peak of a signal band-limited to
    # 0.1 fs locates it to about 1 % of a sample
    assert abs(est.delay_samples - tau) < 0.01
    assert est.peak > 0.98  # normalized correlation of a delayed copy (Cauchy-Schwarz: <= 1)


def test_max_lag_must_be_below_the_record_length():
    with pytest.raises(ConfigError, match="max_lag"):
        estimate_delay(np.ones(10), np.ones(10), max_lag=10)
