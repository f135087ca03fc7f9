"""Tests of liveshape.dsp.synth against outside references.

Single-frame periodograms and the window are tested in test_frames.py, gain ramps alone in
test_ramp.py.

Statistical tolerances are probability bounds fixed before looking at the data: unless stated
otherwise a check fails by chance with probability about 1e-4 (a 4-sigma normal bound, or the
1e-4 two-sided quantiles of the exact chi-square, F or binomial distribution). Seeds are fixed,
so the results are reproducible.
"""

from __future__ import annotations

import math
import sys
import tracemalloc

import numpy as np
import pytest
import scipy.fft
from scipy import signal, stats

from liveshape.dsp.synth import (
    GainRamp,
    RandomPhaseSynth,
    RunningMoments,
    SynthStats,
    line_scales,
    random_phase_frame,
    sine_window,
)
from liveshape.errors import ConfigError

P_FAIL = 1e-4  # chance of a false failure per statistical check
Z4 = 4.0  # normal bound used with standard errors: two-sided P = 6.3e-5


def white_psd(n_lines: int, level: float = 1.0) -> np.ndarray:
    """Flat on every line but DC and Nyquist: samples of such a process are nearly independent."""
    p = np.full(n_lines, level)
    p[0] = p[-1] = 0.0
    return p


def make_synth(fs_hz=1000.0, n=256, psd=None, **kw) -> RandomPhaseSynth:
    s = RandomPhaseSynth(fs_hz, n, **kw)
    s.set_psd(white_psd(s.n_lines) if psd is None else psd)
    return s


def chi2_var_bounds(k: int) -> tuple[float, float]:
    """Bounds of mean(x^2)/sigma^2 for k independent normal samples (chi-square, k DOF)."""
    return stats.chi2.ppf(P_FAIL / 2, k) / k, stats.chi2.ppf(1 - P_FAIL / 2, k) / k




# --------------------------------------------------------------------------- construction
def test_clip_sigma_below_crest_floor_is_refused():
    # IEC 60068-2-64: drive crest factor >= 2.5, so clipping below 2.5 sigma is not allowed
    with pytest.raises(ConfigError, match=r"clip_sigma = 2\.4.*IEC 60068-2-64.*2\.5"):
        RandomPhaseSynth(1000.0, 64, clip_sigma=2.4)
    assert RandomPhaseSynth(1000.0, 64, clip_sigma=2.5).clip_sigma == 2.5


@pytest.mark.parametrize("bad", [{"frame_length": 63}, {"frame_length": 2}, {"fs_hz": 0.0}])
def test_bad_construction_is_refused(bad):
    args = {"fs_hz": 1000.0, "frame_length": 64} | bad
    with pytest.raises(ConfigError):
        RandomPhaseSynth(**args)
    with pytest.raises(ConfigError, match="amplitudes"):
        RandomPhaseSynth(1000.0, 64, amplitudes="flat")


def test_properties_and_psd_shape():
    s = RandomPhaseSynth(48000.0, 8192)
    assert (s.hop, s.n_lines, s.delta_f) == (4096, 4097, 48000.0 / 8192)
    assert np.array_equal(s.f_hz, np.fft.rfftfreq(8192, 1 / 48000.0))  # numpy as reference
    with pytest.raises(ConfigError, match="4097"):
        s.set_psd(np.ones(4096))
    with pytest.raises(ConfigError):
        s.set_psd(-np.ones(4097))
    assert np.all(s.read(100) == 0.0)  # no PSD set yet: silence


# --------------------------------------------------------------------------- kurtosis


def _kurtosis_se(x: np.ndarray, n_batches: int) -> tuple[float, float]:
    """Pooled kurtosis mean(x^4)/mean(x^2)^2 of zero-mean data and its standard error by the
    delta method over batch means (batches long against the correlation time)."""
    b = x[: x.size // n_batches * n_batches].reshape(n_batches, -1)
    a4, a2 = np.mean(b**4, axis=1), np.mean(b**2, axis=1)
    m4, m2 = a4.mean(), a2.mean()
    k = m4 / m2**2
    z = a4 / m2**2 - 2 * m4 * a2 / m2**3
    return k, z.std(ddof=1) / math.sqrt(n_batches)


def test_fixed_frame_kurtosis_formula():
    fs, n = 1000.0, 64
    psd = np.zeros(n // 2 + 1)
    psd[3:9] = [1.0, 2.0, 3.0, 1.0, 0.5, 2.5]
    rng = np.random.default_rng(5)
    frames = np.array(
        [random_phase_frame(psd, fs, seed=rng, amplitudes="fixed") for _ in range(6000)]
    )
    # sum of independent random-phase sines: kurtosis 3 - 1.5 sum a^4 / (sum a^2)^2, a^2 ~ psd
    expected = 3 - 1.5 * np.sum(psd**2) / np.sum(psd) ** 2
    k, se = _kurtosis_se(frames.ravel(), 200)
    assert abs(k - expected) < Z4 * se
    assert expected < 3 - 10 * se  # the check can tell this from a Gaussian
    # the same lines with Rayleigh amplitudes are Gaussian (kurtosis 3)
    frames_r = np.array([random_phase_frame(psd, fs, seed=rng) for _ in range(6000)])
    kr, se_r = _kurtosis_se(frames_r.ravel(), 200)
    assert abs(kr - 3.0) < Z4 * se_r


def test_fixed_stream_kurtosis_after_overlap_add():
    n = 64
    psd = np.zeros(n // 2 + 1)
    psd[4:10] = 1.0
    s = make_synth(1000.0, n, psd, seed=8, amplitudes="fixed")
    x = s.read(800_000)
    # independent frames: fourth cumulants add with weights w^4 and the mean of sin^4 + cos^4
    # over a hop is 3/4, so the excess kurtosis of one frame (-1.5 sum a^4/(sum a^2)^2,
    # random-phase sines) shrinks to 3/4 of it [calc]
    expected = 3 - 0.75 * 1.5 * np.sum(psd**2) / np.sum(psd) ** 2
    k, se = _kurtosis_se(x, 500)
    assert abs(k - expected) < Z4 * se
    one_frame = 3 - 1.5 * np.sum(psd**2) / np.sum(psd) ** 2
    assert abs(k - one_frame) > Z4 * se  # the check tells the stream from a single frame
    assert s.stats.kurtosis == pytest.approx(stats.kurtosis(x, fisher=False), rel=1e-9)


# --------------------------------------------------------------------------- Gaussian stream
def test_rayleigh_stream_is_gaussian_and_obeys_parseval():
    s = make_synth(1000.0, 256, seed=21)
    sigma2 = np.sum(white_psd(s.n_lines)) * s.delta_f
    n = 2**21
    x = s.read(n)
    # Parseval: variance = sum(psd) * delta_f; near-white Gaussian samples are independent, so
    # mean(x^2)/sigma^2 is chi-square with n DOF
    lo, hi = chi2_var_bounds(n)
    assert lo < np.mean(x**2) / sigma2 < hi
    # normal distribution: kurtosis 3 with standard error sqrt(24/N)
    assert abs(stats.kurtosis(x, fisher=False) - 3.0) < Z4 * math.sqrt(24 / n)
    # normal distribution: P(|x| > 3 sigma) = 2.700e-3; binomial bounds for n samples
    p3 = 2 * stats.norm.sf(3.0)
    lo_c, hi_c = stats.binom.interval(1 - P_FAIL, n, p3)
    assert lo_c <= np.count_nonzero(np.abs(x) > 3 * math.sqrt(sigma2)) <= hi_c
    # running stats agree with numpy/scipy on the same samples
    st = s.stats
    assert st.n_samples == n
    assert st.rms == pytest.approx(np.sqrt(np.mean(x**2)), rel=1e-12)
    assert st.peak == np.max(np.abs(x))
    assert st.crest_factor == pytest.approx(st.peak / st.rms, rel=1e-12)
    assert st.kurtosis == pytest.approx(stats.kurtosis(x, fisher=False), rel=1e-9)
    assert st.clipped_fraction == 0.0


def test_welch_psd_inside_chi2_band():
    fs, n = 8000.0, 512
    s = RandomPhaseSynth(fs, n, seed=4)
    f = s.f_hz
    band = (f >= 200) & (f <= 3000)
    psd = np.where(band, 2e-4, 0.0)
    s.set_psd(psd)
    x = s.read(n * 32)
    # scipy as reference estimator: Welch, Hann, 50 % overlap, nperseg = frame_length
    fw, pxx = signal.welch(x, fs, window="hann", nperseg=n, noverlap=n // 2, detrend=False)
    k = (x.size - n) // (n // 2) + 1
    # Welch 1967: DOF = 2K / (1 + 2 c^2 (K-1)/K), c = overlap correlation of the window
    w = signal.get_window("hann", n)
    c = np.sum(w[: n // 2] * w[n // 2 :]) / np.sum(w**2)
    dof = 2 * k / (1 + 2 * c**2 * (k - 1) / k)
    # lines away from the band edges (window smoothing rounds the edges over a few lines)
    inner = (fw >= 200 + 3 * s.delta_f) & (fw <= 3000 - 3 * s.delta_f)
    r_db = 10 * np.log10(pxx[inner] / psd[inner])
    # Bendat & Piersol: estimate/true ~ chi2(dof)/dof; 90 % interval in dB
    lo = 10 * math.log10(stats.chi2.ppf(0.05, dof) / dof)
    hi = 10 * math.log10(stats.chi2.ppf(0.95, dof) / dof)
    inside = np.mean((r_db > lo) & (r_db < hi))
    # adjacent Hann lines are correlated (power correlation ~1/4): count every other line as
    # independent, binomial bounds on the fraction inside the 90 % interval
    m = int(inner.sum()) // 2
    blo, bhi = stats.binom.interval(1 - P_FAIL, m, 0.9)
    assert blo / m <= inside <= bhi / m
    # mean dB deviation: E[10 log10(chi2_v / v)] = 4.343 (digamma(v/2) - ln(v/2)) (gamma
    # distribution), standard deviation 4.343 sqrt(trigamma(v/2)) per line
    from scipy.special import polygamma, psi

    mean_exp = 10 / math.log(10) * (psi(dof / 2) - math.log(dof / 2))
    sd = 10 / math.log(10) * math.sqrt(polygamma(1, dof / 2))
    assert abs(r_db.mean() - mean_exp) < Z4 * sd / math.sqrt(m)


# --------------------------------------------------------------------------- stationarity
def _seam_mid_ratio(x: np.ndarray, hop: int, width: int) -> tuple[float, int]:
    """Variance near frame seams over variance mid-hop; also the samples per group."""
    b = x[: x.size // hop * hop].reshape(-1, hop)
    seam = np.concatenate([b[:, : width // 2], b[:, hop - width // 2 :]], axis=1)
    mid = b[:, hop // 2 - width // 2 : hop // 2 + width // 2]
    return np.mean(seam**2) / np.mean(mid**2), seam.size


def _f_bounds(k: int) -> tuple[float, float]:
    """Ratio of two independent variance estimates with k DOF each (F distribution)."""
    return stats.f.ppf(P_FAIL / 2, k, k), stats.f.ppf(1 - P_FAIL / 2, k, k)


def _hann_ola(psd, fs, n, n_frames, seed):
    """Random-phase frames overlap-added at 50 % with a periodic Hann window (amplitude
    complementary, not power complementary) -- the wrong construction."""
    rng = np.random.default_rng(seed)
    w = signal.get_window("hann", n)
    hop = n // 2
    out = np.zeros(hop * (n_frames + 1))
    for j in range(n_frames):
        out[j * hop : j * hop + n] += w * random_phase_frame(psd, fs, seed=rng)
    return out[hop:-hop]


def test_variance_at_frame_seams_equals_mid_frame_and_hann_would_fail():
    fs, n = 1000.0, 256
    hop, width = n // 2, 16
    s = make_synth(fs, n, seed=2)
    x = s.read(hop * 20000)
    ratio, k = _seam_mid_ratio(x, hop, width)
    lo, hi = _f_bounds(k)
    # Smallwood & Paez 1993: with a power-complementary window the variance does not depend on
    # the position in the frame (near-white samples: each group is chi-square with k DOF)
    assert lo < ratio < hi
    sigma2 = np.sum(white_psd(s.n_lines)) * s.delta_f
    clo, chi = chi2_var_bounds(x.size)
    assert clo < np.mean(x**2) / sigma2 < chi
    # the same check catches Hann at 50 %: sum of squares 1 at the seam, 1/2 mid-hop [calc]
    y = _hann_ola(white_psd(n // 2 + 1), fs, n, 20000, seed=2)
    ratio_h, k_h = _seam_mid_ratio(y, hop, width)
    assert not (_f_bounds(k_h)[0] < ratio_h < _f_bounds(k_h)[1])
    assert ratio_h > 1.8
    # and its mean power is low by 10 log10(3/4) = -1.25 dB (mean of sin^4 + cos^4) [calc]
    assert 10 * math.log10(np.mean(y**2) / sigma2) == pytest.approx(-1.249, abs=0.05)


def test_primed_output_is_stationary_from_the_first_sample():
    n = 64
    first = np.array([make_synth(1000.0, n, seed=i).read(n // 2) for i in range(3000)])
    sigma2 = np.sum(white_psd(n // 2 + 1)) * 1000.0 / n
    # each position across 3000 independent streams: chi-square with 3000 DOF; the smallest
    # and the largest of the 32 positions must both be inside (Bonferroni over 32 positions)
    lo32, hi32 = stats.chi2.ppf([P_FAIL / 64, 1 - P_FAIL / 64], 3000) / 3000
    v = np.mean(first**2, axis=0) / sigma2
    assert lo32 < v.min() and v.max() < hi32


def _seam_step_ratio(x: np.ndarray, hop: int) -> tuple[float, int]:
    """Variance of the sample-to-sample step across block seams over that of a mid-hop step."""
    b = x[: x.size // hop * hop].reshape(-1, hop)
    seam = b[1:, 0] - b[:-1, -1]
    mid = b[:, hop // 2] - b[:, hop // 2 - 1]
    mid = mid[: seam.size]
    return np.mean(seam**2) / np.mean(mid**2), seam.size


def test_continuity_across_seams_and_a_step_would_be_caught():
    fs, n = 1000.0, 256
    hop = n // 2
    psd = np.zeros(n // 2 + 1)
    psd[1 : n // 16] = 1.0  # low-pass: steps are small against the signal
    s = make_synth(fs, n, psd, seed=9)
    x = s.read(hop * 20000)
    ratio, k = _seam_step_ratio(x, hop)
    # steps one hop apart are independent: F bounds with k DOF each
    lo, hi = _f_bounds(k)
    assert lo < ratio < hi
    # frames simply concatenated (no window, no overlap) step at every seam: caught
    rng = np.random.default_rng(9)
    y = np.concatenate([random_phase_frame(psd, fs, seed=rng) for _ in range(20000)])
    ratio_c, k_c = _seam_step_ratio(y, n)
    assert ratio_c > _f_bounds(k_c)[1] * 10


def test_set_psd_takes_effect_from_the_next_frame():
    n, hop = 64, 32
    psd = np.zeros(n // 2 + 1)
    psd[2:12] = 1.0
    ref = make_synth(1000.0, n, psd, seed=6).read(6 * hop)
    a = make_synth(1000.0, n, psd, seed=6)
    zero = make_synth(1000.0, n, psd, seed=6)
    xa = [a.read(3 * hop)]
    xz = [zero.read(3 * hop)]
    a.set_psd(4 * psd)
    zero.set_psd(np.zeros_like(psd))
    xa.append(a.read(3 * hop))
    xz.append(zero.read(3 * hop))
    xa, xz = np.concatenate(xa), np.concatenate(xz)
    assert np.array_equal(xa[: 3 * hop], ref[: 3 * hop])  # nothing changes before the next frame
    tail = xz[3 * hop : 4 * hop]  # the transition block holds only the old frame's tail
    assert np.all(xz[4 * hop :] == 0.0) and np.any(tail != 0.0)
    # 4x the PSD is 2x the amplitude from the next frame on (same span of lines, same draws)
    assert np.allclose(xa[3 * hop : 4 * hop], 2 * ref[3 * hop : 4 * hop] - tail, atol=1e-12)
    assert np.allclose(xa[4 * hop :], 2 * ref[4 * hop :], atol=1e-12)


# --------------------------------------------------------------------------- determinism, memory
def test_same_seed_same_stream_whatever_the_read_sizes():
    a = make_synth(seed=123).read(5000)
    b_s = make_synth(seed=123)
    b = np.concatenate([b_s.read(k) for k in (0, 1, 127, 128, 129, 1000, 3615)])
    assert np.array_equal(a, b)
    assert not np.array_equal(a, make_synth(seed=124).read(5000))
    c = make_synth(seed=np.random.default_rng(123)).read(5000)
    assert np.array_equal(a, c)  # a Generator with the same seed draws the same stream
    out = np.empty(700)
    assert np.array_equal(make_synth(seed=123).read(700, out=out), a[:700])


def _footprint(obj) -> int:
    total = sys.getsizeof(obj)
    for v in vars(obj).values():
        if isinstance(v, np.ndarray):
            total += v.nbytes
        elif hasattr(v, "__dict__") and not isinstance(v, np.random.Generator):
            total += _footprint(v)
        else:
            total += sys.getsizeof(v)
    return total


def test_constant_memory_over_many_reads():
    s = make_synth(1000.0, 1024, seed=1, clip_sigma=3.0)
    s.read(5000)
    s.set_gain(0.5, rate_db_s=3.0)
    size0 = _footprint(s)
    shapes0 = {k: v.shape for k, v in vars(s).items() if isinstance(v, np.ndarray)}
    rng = np.random.default_rng(0)
    sizes = rng.integers(1, 3000, 1500)
    tracemalloc.start()
    s.read(100)
    base = tracemalloc.get_traced_memory()[0]
    for k in sizes:
        s.read(int(k))
    grown = tracemalloc.get_traced_memory()[0] - base
    tracemalloc.stop()
    assert _footprint(s) == size0
    assert {k: v.shape for k, v in vars(s).items() if isinstance(v, np.ndarray)} == shapes0
    # 1500 reads: any per-read growth of even one float would show; bound = one frame of floats
    assert grown < 1024 * 8
    assert s.stats.n_samples == 5100 + int(sizes.sum())


# --------------------------------------------------------------------------- clipping and gain
@pytest.mark.parametrize("c", [2.5, 3.0, 4.0])  # 4: most blocks are not clipped at all
def test_clipped_fraction_matches_normal_tail(c):
    s = make_synth(1000.0, 256, seed=31, clip_sigma=c)
    n = 2**20
    x = s.read(n)
    sigma = math.sqrt(np.sum(white_psd(s.n_lines)) * s.delta_f)
    # normal distribution: P(|x| > c sigma) = 2 Q(c) (1.24e-2 at 2.5, 2.70e-3 at 3); binomial
    lo, hi = stats.binom.interval(1 - P_FAIL, n, 2 * stats.norm.sf(c))
    assert lo <= s.stats.clipped_fraction * n <= hi
    assert np.max(np.abs(x)) <= c * sigma * (1 + 1e-12)
    assert s.stats.crest_factor <= c / 0.98  # rms drops by < 2 % when clipping 2.5 sigma [calc]


def test_clip_level_follows_a_psd_change():
    n = 256
    s = make_synth(1000.0, n, seed=3, clip_sigma=3.0)
    s.read(1000)
    s.set_psd(white_psd(n // 2 + 1, 100.0))  # +20 dB
    y = s.read(50 * n)
    sigma_new = math.sqrt(100.0 * np.sum(white_psd(n // 2 + 1)) * s.delta_f)
    # after the transition the clip level is 3 x the new rms, so the tail fraction is normal
    # again; a level stuck at the old rms would clip almost every sample
    assert np.max(np.abs(y[n:])) <= 3 * sigma_new * (1 + 1e-12)
    # Every sample, before, across and after the change, is clipped at 3 x its nominal rms, so
    # the count of clipped samples is binomial with p = 2 Q(3) = 2.70e-3 (normal tail; the
    # samples of a flat spectrum are nearly independent): 37 of 13 800 expected, 1e-4 bounds
    # 16..63. Clipping at the IEC 60068-2-64 floor of 2.5 sigma would give 171; a bound of 2 %
    # (276) would pass clipping at 2.3 sigma.
    m = s.stats.n_samples
    assert m == 1000 + 50 * n
    lo, hi = stats.binom.interval(1 - P_FAIL, m, 2 * stats.norm.sf(3.0))
    assert lo <= s.stats.clipped_fraction * m <= hi


def test_clip_level_blends_over_the_transition_block():
    n = 128
    hop = n // 2
    s = make_synth(1000.0, n, seed=13, clip_sigma=3.0)
    s.read(10 * hop)
    s.reset_stats()
    levels = (1.0, 100.0)
    for i in range(400):  # every block is a transition between two levels 20 dB apart
        s.set_psd(white_psd(n // 2 + 1, levels[i % 2]))
        s.read(hop)
    # the nominal variance of a transition sample is w_tail^2 v_old + w_head^2 v_new; clipped at
    # 3 x its root the fraction is the normal tail 2 Q(3) (binomial bounds)
    m = 400 * hop
    lo, hi = stats.binom.interval(1 - P_FAIL, m, 2 * stats.norm.sf(3.0))
    assert lo <= s.stats.clipped_fraction * m <= hi


def test_gain_ramp_is_applied_per_sample_to_the_stream():
    fs = 1000.0
    ref = make_synth(fs, 128, seed=17).read(3000)
    s = make_synth(fs, 128, seed=17)
    x1 = s.read(500)
    s.set_gain(0.0, duration_s=0.3)
    assert s.ramping and s.gain_target == 0.0
    x2 = s.read(2500)
    ramp = GainRamp(fs, gain=1.0, fade_s=0.3)
    ramp.set(0.0)
    g = np.empty(2500)
    ramp.fill(g)
    assert np.array_equal(x1, ref[:500])
    assert np.allclose(x2, ref[500:] * g, rtol=0, atol=1e-15)
    assert not s.ramping and s.gain == 0.0 and np.all(x2[300:] == 0.0)
    assert isinstance(s.stats, SynthStats)


@pytest.mark.parametrize("line", ["dc", "nyquist"])
def test_fixed_real_lines_get_a_random_sign_of_fixed_size(line):
    n, fs = 64, 1000.0
    hop = n // 2
    psd = np.zeros(n // 2 + 1)
    k = 0 if line == "dc" else n // 2
    psd[k] = 2.0
    s = make_synth(fs, n, psd, seed=4, amplitudes="fixed")
    x = s.read(400 * hop).reshape(-1, hop)
    c = math.sqrt(2.0 * fs / n)  # a real line of mean square psd * delta_f has amplitude c
    carrier = np.cos(np.pi * k * np.arange(hop) / (n // 2))  # 1 at DC, (-1)^n at Nyquist
    w = sine_window(n)
    u = x / (c * carrier)  # each block is s_prev * w_tail + s_new * w_head, s = +-1
    same, flip = np.abs(w[hop:] + w[:hop]), np.abs(w[hop:] - w[:hop])
    is_same = np.all(np.isclose(np.abs(u), same, atol=1e-12), axis=1)
    is_flip = np.all(np.isclose(np.abs(u), flip, atol=1e-12), axis=1)
    assert np.all(is_same | is_flip)
    # independent fair signs: sign changes between frames are binomial(399, 1/2)
    lo, hi = stats.binom.interval(1 - P_FAIL, is_flip[1:].size, 0.5)
    assert lo <= np.count_nonzero(is_flip[1:]) <= hi


# --------------------------------------------------------------------------- the construction
@pytest.mark.parametrize(
    "band", [(3, 40), (0, 9), (100, 128), (100, 200), (1, 257), (1, 513), (200, 513)]
)
def test_stream_is_the_documented_overlap_add_of_scipy_inverse_ffts(band):
    n, fs, seed = 1024, 48000.0, 5
    lo, hi = band  # lines lo .. hi - 1 non-zero
    psd = np.zeros(n // 2 + 1)
    psd[lo:hi] = np.linspace(1.0, 2.0, hi - lo)
    s = make_synth(fs, n, psd, seed=seed)
    x = s.read(6 * n)
    # the construction of the module docstring, with scipy.fft.irfft as reference: per frame
    # 2 (hi - lo) standard normals, re and im of each line in turn, times line_scales; frames
    # windowed by the sine window and overlap-added at 50 % (the first one primes the tail)
    rng = np.random.default_rng(seed)
    re, im = line_scales(psd, fs / n)
    w = sine_window(n)
    frames = []
    for _ in range(13):
        z = rng.standard_normal(2 * (hi - lo))
        coef = np.zeros(n // 2 + 1, dtype=complex)
        coef[lo:hi] = z[0::2] * re[lo:hi] + 1j * z[1::2] * im[lo:hi]
        frames.append(w * scipy.fft.irfft(coef, n))
    hop = n // 2
    ref = np.concatenate([frames[j][hop:] + frames[j + 1][:hop] for j in range(12)])
    # float64 rounding of an n-point inverse FFT: eps log2(n) of the rms (Higham 2002, 24.1)
    np.testing.assert_allclose(x, ref, rtol=0, atol=1e-12 * np.sqrt(np.mean(ref**2)))


# --------------------------------------------------------------------------- running moments
@pytest.mark.parametrize(
    "sizes", [(1,), (8191, 1, 2), (8192, 8192, 5), (20000,), (3000,) * 10, (100, 1, 1) * 40]
)
def test_running_moments_match_scipy_across_chunks_and_offsets(sizes):
    rng = np.random.default_rng(len(sizes))
    n = sum(sizes)
    sigma = 1.0
    x = 1e6 + sigma * rng.standard_t(5, n)  # a large offset and heavy tails
    m = RunningMoments()
    pos = 0
    for k in sizes:
        m.update(x[pos : pos + k])
        pos += k
    # scipy.stats as reference. Bound: the mean of n values near 1e6 is off by at most
    # eps log2(n) 1e6 (pairwise summation, Higham 2002 sec. 4.2), < 1e-8 sigma here, and
    # moments about a mean off by d change by k d m_(k-1): so 1e-7 sigma^k is float64 rounding.
    # Raw power sums lose 12 digits to the offset and would miss this bound by far.
    tol = 1e-7
    assert m.n == n
    assert m.mean == pytest.approx(np.mean(x), abs=tol * sigma)
    assert m.peak == np.max(np.abs(x))
    if n > 1:
        for k, mk in ((2, m.m2), (3, m.m3), (4, m.m4)):
            assert abs(mk / n - stats.moment(x, k)) <= tol * sigma**k
        assert m.kurtosis == pytest.approx(stats.kurtosis(x, fisher=False), rel=tol)
        assert m.rms == pytest.approx(np.sqrt(np.mean(x**2)), rel=1e-12)


def test_running_moments_do_not_depend_on_when_they_are_read():
    rng = np.random.default_rng(7)
    x = rng.standard_normal(50_000)
    lazy, eager = RunningMoments(), RunningMoments()
    for i in range(0, x.size, 777):
        lazy.update(x[i : i + 777])
        eager.update(x[i : i + 777])
        assert eager.n == i + x[i : i + 777].size
        # a read merges the samples gathered so far: it equals the rms of all of them (numpy as
        # reference; float64 rounding of sums of 5e4 squares, common practice bound)
        assert eager.rms == pytest.approx(np.sqrt(np.mean(x[: eager.n] ** 2)), rel=1e-12)
    # the same exact merges over other chunk boundaries: float64 rounding (common practice)
    for name in ("mean", "m2", "m3", "m4", "rms", "kurtosis"):
        assert getattr(eager, name) == pytest.approx(getattr(lazy, name), rel=1e-12, abs=1e-12)
    assert eager.peak == lazy.peak == np.max(np.abs(x))
    lazy.reset()
    assert lazy.n == 0 and lazy.rms == 0.0 and math.isnan(lazy.kurtosis)


def test_moved_names_are_reexported():
    # other modules import these from liveshape.dsp.synth; they live in frames, ramp and moments
    from liveshape.dsp import frames, moments, ramp, synth

    for name in ("AMPLITUDES", "sine_window", "line_scales", "draw_coefficients",
                 "random_phase_frame"):
        assert getattr(synth, name) is getattr(frames, name)
    assert synth.GainRamp is ramp.GainRamp
    assert synth.RunningMoments is moments.RunningMoments
