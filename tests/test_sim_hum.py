"""Mains hum in the simulated rig and the ``rig.hum`` key of a test definition."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal, stats

from liveshape.errors import ConfigError
from liveshape.rigs.hum import HumSpec
from liveshape.rigs.plant import load_plant
from liveshape.rigs.sim import SimRig
from liveshape.testdef.spec import spec_from_mapping, spec_to_mapping

FS = 8000.0
N = 16 * 8192
SPEC = HumSpec(50.0, 3, 0.02)


def _drive(n: int = N) -> np.ndarray:
    return 0.005 * np.random.default_rng(7).standard_normal(n)


def _run(rig: SimRig, d: np.ndarray, block: int = 3000) -> np.ndarray:
    return np.concatenate([rig.process(d[i:i + block]) for i in range(0, d.size, block)])


def _lines_g(x_g: np.ndarray, freqs: np.ndarray) -> np.ndarray:
    """Rms of each line by least squares on cos/sin regressors (numpy.linalg.lstsq)."""
    t = np.arange(x_g.size) / FS
    cols = [np.ones_like(t)]
    for f in freqs:
        cols += [np.cos(2 * math.pi * f * t), np.sin(2 * math.pi * f * t)]
    coef, *_ = np.linalg.lstsq(np.column_stack(cols), x_g, rcond=None)
    return np.hypot(coef[1::2], coef[2::2]) / math.sqrt(2)


def test_hum_adds_only_the_lines_in_g_through_the_calibration():
    # Same seed, same drive: the hum rig minus the hum-free rig is the hum alone (the noise
    # streams are untouched), in FS = g x fs_per_g of the rig's calibration; each line's rms is
    # level_g (least squares, numpy.linalg.lstsq; the rms of a sine is its amplitude/√2).
    plant = load_plant("loudspeaker")
    d = _drive(4 * 8000)
    out0 = _run(SimRig(plant, FS, seed=3), d)
    rig = SimRig(plant, FS, seed=3, hum=SPEC)
    diff_g = (_run(rig, d) - out0) * rig.calibration.g_per_fs
    np.testing.assert_allclose(_lines_g(diff_g, SPEC.frequencies_hz()), 0.02, rtol=1e-9)
    # nothing else: the lines account for the whole difference (Parseval over whole periods)
    assert np.mean(diff_g**2) == pytest.approx(3 * 0.02**2, rel=1e-9)


def test_hum_free_rig_is_unchanged_and_hum_is_seeded():
    plant = load_plant("loudspeaker")
    d = _drive(20000)
    a = _run(SimRig(plant, FS, seed=3), d)
    assert np.array_equal(a, _run(SimRig(plant, FS, seed=3, hum=None), d))
    h1 = _run(SimRig(plant, FS, seed=3, hum=SPEC), d)
    assert np.array_equal(h1, _run(SimRig(plant, FS, seed=3, hum=SPEC), d, block=777))
    # the hum's start phases come from the rig seed
    hum3 = h1 - a
    hum4 = _run(SimRig(plant, FS, seed=4, hum=SPEC), d) - _run(SimRig(plant, FS, seed=4), d)
    assert np.max(np.abs(hum3 - hum4)) > 0.01 * np.max(np.abs(hum3))


def test_welch_shows_the_lines_at_the_mains_frequency_and_level():
    # Welch PSD (scipy.signal.welch, Hann, 50 % overlap). A sine's power spreads over its
    # window's main lobe, so the band power Σ G·df over ±4 lines around it is its mean square
    # level_g² (Parseval; Welch 1967) plus the random background, whose band estimate is
    # χ²-distributed with ν ≈ 2·n_d·(lines) degrees of freedom (Bendat & Piersol, Random Data,
    # 4th ed., §8.5.4): the line power must lie between the band power minus the χ² upper bound
    # of the background and the band power minus its lower bound, give or take the sine x noise
    # cross term, whose standard deviation is sqrt(2·P_line·P_bg_per_line/n_d), doubled for
    # the correlation of adjacent Hann lines; allowance 5 of them [common practice].
    plant = load_plant("loudspeaker")
    d = _drive()
    rig0 = SimRig(plant, FS, seed=5)
    righ = SimRig(plant, FS, seed=5, hum=SPEC)
    g_per_fs = righ.calibration.g_per_fs
    nper = 8192
    f, g0 = signal.welch(_run(rig0, d) * g_per_fs, FS, nperseg=nper)
    _, gh = signal.welch(_run(righ, d) * g_per_fs, FS, nperseg=nper)
    df = f[1] - f[0]
    n_d = N // nper  # non-overlapping count: conservative for 50 % overlap
    for f_line in SPEC.frequencies_hz():
        j = int(np.argmin(np.abs(f - f_line)))
        assert int(np.argmax(gh[j - 6:j + 7] - g0[j - 6:j + 7])) == 6  # the peak is at h·mains
        band = slice(j - 4, j + 5)
        p_band = float(gh[band].sum() * df)
        p_bg = float(g0[band].sum() * df)
        nu = 2 * n_d * 9
        bg_hi = p_bg * nu / stats.chi2.ppf(1e-4, nu)
        bg_lo = p_bg * nu / stats.chi2.isf(1e-4, nu)
        cross = 5 * 2 * math.sqrt(2 * SPEC.level_g**2 * (bg_hi / 9) / n_d)
        assert p_band - bg_hi - cross <= SPEC.level_g**2 <= p_band - bg_lo + cross, \
            (f_line, p_band, p_bg, cross)
        assert gh[j] > 10 * g0[j]  # the line stands out of the control ASD by 10 dB or more


def _mapping(**rig):
    return {"profile": {"breakpoints": [{"f_hz": 20, "asd": 0.01}, {"f_hz": 2000, "asd": 0.01}]},
            "rig": rig}


def test_rig_hum_key_reads_round_trips_and_reaches_the_simulated_rig():
    from liveshape.session import build_sim_rig

    s = spec_from_mapping(_mapping(hum={"mains_hz": 60, "harmonics": 2, "level_g": 0.05}),
                          source="t.yaml")
    assert s.rig.hum == HumSpec(60.0, 2, 0.05)
    again = spec_from_mapping(spec_to_mapping(s), source="t.yaml")
    assert again == s
    assert spec_from_mapping(_mapping(), source="t.yaml").rig.hum is None
    rig, cal, mapping = build_sim_rig(s, 1)
    assert mapping["hum"]["level_g"] == 0.05
    x_g = rig.process(np.zeros(int(s.control.fs_hz))) * cal.g_per_fs  # 1 s: whole periods
    np.testing.assert_allclose(_lines_g_at(x_g, s.control.fs_hz, [60.0, 120.0]), 0.05,
                               rtol=1e-3)


def _lines_g_at(x_g, fs, freqs):
    t = np.arange(x_g.size) / fs
    out = []
    for f in freqs:
        c = 2 * np.mean(x_g * np.cos(2 * math.pi * f * t))
        s = 2 * np.mean(x_g * np.sin(2 * math.pi * f * t))
        out.append(math.hypot(c, s) / math.sqrt(2))
    return np.array(out)


@pytest.mark.parametrize(("rig", "needle"), [
    ({"hum": {"mains_hz": 55}}, "t.yaml: rig.hum.mains_hz = 55 must be 50 or 60"),
    ({"hum": {"levl_g": 0.1}}, "t.yaml: rig.hum.levl_g: unknown key"),
    ({"hum": {"level_g": -1}}, "t.yaml: rig.hum.level_g = -1 must be > 0"),
    ({"kind": "audio", "device": "x", "hum": {}}, "t.yaml: rig.hum = {"),
])
def test_bad_rig_hum_is_one_line_naming_the_key(rig, needle):
    with pytest.raises(ConfigError) as e:
        spec_from_mapping(_mapping(**rig), source="t.yaml")
    msg = str(e.value)
    assert "\n" not in msg and needle in msg, msg
    if rig.get("kind") == "audio":
        assert "simulated rig only (rig.kind = audio)" in msg
