"""The fast update loop: its estimators against outside references, and the loop's promises.

Outside references: scipy.signal.welch (segment periodograms), Welch (1967) for the expected
periodogram of a windowed segment and for the DOF of weighted averages of overlapped segments,
the χ² distribution (scipy.stats.chi2) for the scatter of averages.
"""

from __future__ import annotations

import dataclasses
import hashlib
from pathlib import Path

import numpy as np
import pytest
import scipy.signal as ss
from scipy import stats

from liveshape.control.controller import Controller
from liveshape.control.drivestream import DriveStream
from liveshape.control.fastloop import DecisionWindow
from liveshape.control.stages import segments_for_dof
from liveshape.control.tracking import PowerGainTracker, n_avg_for_dof
from liveshape.dsp.segments import SegmentPowers
from liveshape.dsp.spectra import db_scatter_std, welch_dof
from liveshape.dsp.spectral_stats import overlap_correlation_sq, weighted_average_dof
from liveshape.rigs.plant import load_plant
from liveshape.rigs.sim import SimRig
from liveshape.testdef.spec import FaultSpec, load_spec

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "handlebar-nav-unit.yaml"
C2 = overlap_correlation_sq("hann", 0.5, 8192)


def test_segment_powers_average_is_scipy_welch():
    # Reference: scipy.signal.welch (Hann, 50 % overlap, constant detrend, density scaling).
    x = np.random.default_rng(1).standard_normal(48_000)
    lines = np.zeros(513, dtype=bool)
    lines[5:300] = True
    sp = SegmentPowers(48_000.0, 1024, lines)
    got, nxt = [], 0
    for blk in np.array_split(x, 37):  # blocks of any length
        sp.push(blk)
        i, p = sp.pop()
        assert i == nxt
        nxt += p.shape[0]
        got.append(p)
    p = np.concatenate(got)
    _, ref = ss.welch(x, 48_000.0, nperseg=1024)
    assert p.shape[0] == (x.size - 1024) // 512 + 1
    np.testing.assert_allclose(p.mean(axis=0), ref[lines], rtol=1e-12)


def test_segment_spectra_average_to_scipy_welch_and_csd():
    # Reference: scipy.signal.welch and scipy.signal.csd (Hann, 50 % overlap, constant detrend,
    # density scaling) of the same samples; two correlated streams pushed in odd blocks
    from liveshape.dsp.segments import SegmentSpectra

    rng = np.random.default_rng(1)
    x = rng.standard_normal((2, 20_000))
    x[1] += 0.5 * np.roll(x[0], 3)
    lines = np.zeros(129, dtype=bool)
    lines[5:100] = True
    sp = SegmentSpectra(1000.0, 256, lines, 2)
    got, nxt = [], 0
    for a in range(0, x.shape[1], 333):
        sp.push(x[:, a:a + 333])
        i, X = sp.pop()
        assert i == nxt and X.shape[1:] == (2, 95)
        nxt += X.shape[0]
        got.append(X)
    X = np.concatenate(got)
    _, p = ss.welch(x, 1000.0, nperseg=256)
    _, c = ss.csd(x[0], x[1], 1000.0, nperseg=256)
    np.testing.assert_allclose((np.abs(X) ** 2).mean(axis=0), p[:, lines], rtol=1e-12)
    np.testing.assert_allclose((np.conj(X[:, 0]) * X[:, 1]).mean(axis=0), c[lines], rtol=1e-12)
    sp.reset()
    assert sp.pop()[0] == 0


def test_segment_drive_psd_at_a_change_of_spectrum_matches_monte_carlo():
    # Welch (1967): the expected periodogram of a windowed segment is the spectrum seen through
    # the window's power; for independent overlap-added frames each frame enters with the
    # product of the two windows' powers. Checked against the mean periodogram of 300 seeds.
    fs, n = 48_000.0, 1024
    band = np.zeros(n // 2 + 1, dtype=bool)
    band[10:200] = True
    a, b = np.zeros(n // 2 + 1), np.zeros(n // 2 + 1)
    a[band], b[band] = 1e-6, 4e-6
    h = ss.get_window("hann", n)
    scale = 2.0 / (fs * float(h @ h))
    starts = (26_900, 27_700, 28_000, 28_300)
    seeds = 300
    mean = np.zeros(len(starts))
    for seed in range(seeds):
        ds = DriveStream(fs, n, seed=seed, clip_sigma=None, rms_max_fs=1.0, peak_max_fs=10.0,
                         rate_db_s=6.0, fade_s=0.1, history=100_000)
        ds.set_psd(a)
        ds.fade(1.0, 0.01)
        xs = [ds.read(700) for _ in range(40)]
        ds.set_psd(b)  # at sample 28 000, mid-hop
        xs += [ds.read(700) for _ in range(10)]
        x = np.concatenate(xs)
        for k, s in enumerate(starts):
            seg = x[s:s + n]
            spec = np.abs(np.fft.rfft((seg - seg.mean()) * h)) ** 2 * scale
            mean[k] += float(np.mean(spec[band])) / seeds
    predicted = [float(np.mean(ds.segment_psd(s, band))) for s in starts]
    # 190 lines x 300 seeds of χ²₂ periodograms: the mean's relative scatter is about
    # 1/sqrt(57 000) = 0.4 %; 2 % allows the windows' leakage at the band edges
    np.testing.assert_allclose(mean, predicted, rtol=0.02)
    assert predicted[0] == pytest.approx(1e-6) and predicted[-1] == pytest.approx(3.96e-6, rel=0.01)
    assert ds.segment_gain(27_000, n) == 1.0


def test_tracker_dof_is_welch_dof_of_its_weights():
    # Welch (1967): DOF of a weighted average of overlapped segments (weighted_average_dof is
    # the direct sum over all pairs; the tracker carries it recursively).
    n_avg = 12
    tr = PowerGainTracker(3, n_long=n_avg, n_short=4, n_sum=3, c2=C2, change_db=50.0)
    k = 40
    for _ in range(k):
        tr.push(np.ones(3), np.ones(3))
    a = 1.0 / np.minimum(np.arange(1, k + 1), n_avg)
    w = a * np.array([np.prod(1 - a[i + 1:]) for i in range(k)])
    _, dof, _ = tr.estimate()
    assert dof[0] == pytest.approx(weighted_average_dof(w, C2[:1]), rel=1e-9)


def test_tracker_is_unbiased_while_the_drive_changes_and_scatters_like_chi2():
    # The control periodograms are T·D_s·χ²₂/2 with a drive that changes every 4 segments by
    # up to ±3 dB: T̂ must stay unbiased, and its scatter over lines must be that of a χ² of
    # the tracked DOF (scipy.stats.chi2 gives the band for the sample variance).
    rng = np.random.default_rng(3)
    n_lines, t_true = 4000, 2.0
    n_long = n_avg_for_dof(120.0, C2)
    tr = PowerGainTracker(n_lines, n_long=n_long, n_short=6, n_sum=3, c2=C2, change_db=1e9)
    d0 = 10 ** (rng.uniform(-10, 10, n_lines) / 10)  # a shaped drive
    d = d0
    ds = []
    for s in range(300):
        if s % 4 == 0:
            d = d0 * 10 ** (rng.uniform(-3, 3, n_lines) / 10)
        ds.append(d)
        tr.push(t_true * d * rng.exponential(1.0, n_lines), d)
    t_hat, dof, _ = tr.estimate()
    rel = t_hat / t_true
    # mean: within 4 standard errors of 1 (each line's χ² is independent of its drive, so
    # the ratio of the two averages is unbiased; the band factor adds a common error of the
    # band sum's few-hundred DOF, well inside this bound)
    assert abs(rel.mean() - 1.0) < 4 * np.sqrt(np.var(rel) / n_lines) + 0.01
    # variance: each periodogram here is an independent χ²₂/2 (variance 1), entering with the
    # weight w_s = a_s D_s / Σ a D, so var(T̂/T) = Σ w_s² per line (Bendat & Piersol, Random
    # Data, 4th ed., §8.5: variance of averaged independent spectral estimates)
    k = len(ds)
    a = 1.0 / np.minimum(np.arange(1, k + 1), n_long)
    aw = a * np.array([np.prod(1 - a[i + 1:]) for i in range(k)])
    w = aw[:, None] * np.asarray(ds)
    w /= w.sum(axis=0)
    expected = float(np.mean(np.sum(w * w, axis=0)))
    # the sample variance of 4000 lines: χ² band (scipy.stats.chi2), 99.9 %, widened by the
    # non-Gaussian (χ²-weighted) shape of the lines' distribution
    lo, hi = stats.chi2.ppf([0.0005, 0.9995], n_lines - 1) / (n_lines - 1)
    assert expected * lo * 0.9 <= np.var(rel) <= expected * hi * 1.1


def test_tracker_follows_a_band_gain_step_within_a_few_segments_and_restarts_moved_lines():
    rng = np.random.default_rng(5)
    n_lines = 200
    tr = PowerGainTracker(n_lines, n_long=n_avg_for_dof(120.0, C2), n_short=6, n_sum=3, c2=C2,
                          change_db=4.0)
    t = np.ones(n_lines)
    for _ in range(100):
        tr.push(t * rng.exponential(1.0, n_lines), np.ones(n_lines))
    t = t * 0.5  # the whole plant −3 dB
    t[50:70] *= 0.1  # and 20 lines a further −10 dB (a resonance moved)
    moved = np.zeros(n_lines, dtype=bool)
    for _ in range(24):  # 24 segments: 2 s at 8192 points and 48 kHz
        tr.push(t * rng.exponential(1.0, n_lines), np.ones(n_lines))
        _, _, r = tr.estimate()
        moved |= r
    est, _, _ = tr.estimate()
    band_db = 10 * np.log10(np.median(est))
    assert band_db == pytest.approx(-3.0, abs=0.5)  # band sums: hundreds of DOF per segment
    assert moved[50:70].all()
    assert np.count_nonzero(moved) <= 20 + 3  # few restarts of unmoved lines
    assert np.median(10 * np.log10(est[50:70] / 0.05)) == pytest.approx(0.0, abs=1.5)


def test_decision_window_is_a_linear_average_of_the_last_k_rows():
    w = DecisionWindow(5, 2)
    rows = np.arange(24, dtype=float).reshape(12, 2)
    for r in rows:
        w.push(r)
    np.testing.assert_allclose(w.psd, rows[-5:].mean(axis=0))
    assert w.dof == welch_dof(5)


# --------------------------------------------------------------------------- the loop
def _example(full_s: float = 20.0, faults=(), seed: int = 2, **control):
    control.setdefault("loop", "fast")
    spec = load_spec(EXAMPLE)
    spec = dataclasses.replace(
        spec, schedule=dataclasses.replace(spec.schedule, full_level_s=full_s),
        control=dataclasses.replace(spec.control, **control))
    rig = SimRig(load_plant("loudspeaker"), spec.control.fs_hz, seed=seed, faults=faults)
    return spec, rig, Controller(spec, rig.calibration)


def _run(ctl, rig, block=4096, on_block=None):
    resp = np.zeros(block)
    drive = []
    while not ctl.finished:
        d = ctl.exchange(resp)
        drive.append(d)
        resp = rig.process(d)
        if on_block is not None:
            on_block(ctl, rig)
    return np.concatenate(drive)


def test_the_example_runs_the_fast_loop_with_updates_every_update_interval():
    spec, rig, ctl = _example()
    assert spec.control.loop == "fast"
    _run(ctl, rig)
    assert ctl.result().status == "completed"
    times = np.asarray(ctl.drive_update_times_s)
    hop_s = spec.control.frame_length / 2 / spec.control.fs_hz
    m = round(spec.control.update_interval_s / hop_s)
    assert ctl.update_interval_s == pytest.approx(m * hop_s)
    assert np.median(np.diff(times)) == pytest.approx(m * hop_s)
    assert np.median(np.diff(times)) <= 0.5  # the bound for the update interval
    # the full-level average holds (nearly) all of the full-level time: Welch (1967) DOF of
    # the segments in spec.schedule.full_level_s, less a frame and the loop delay at each end
    full = ctl.full_level_arrays()
    segs = int(spec.schedule.full_level_s / hop_s) - 4
    assert full["dof"] >= welch_dof(segs) * 0.9


def test_level_steps_wait_for_the_dof_and_hold_and_no_sooner():
    spec, rig, ctl = _example()
    _run(ctl, rig)
    ev = ctl.events
    ident = next(e.t_s for e in ev if e.kind == "stage" and e.data["stage"] == "equalize")
    levels = [e for e in ev if e.kind == "level"]
    hold = spec.schedule.hold_s
    window_s = segments_for_dof(spec.control.target_dof) * spec.control.frame_length / 2 / 48e3
    # the first step: a decision window filled after identification (its segments during the
    # first level ramp count, normalized by the gain they played), then the hold
    assert levels[1].t_s - ident >= window_s + hold
    for prev, nxt in zip(levels[1:], levels[2:], strict=False):
        # later steps: the ramp, then hold_s of decisions in tolerance at the settled level
        assert nxt.t_s - prev.t_s >= prev.data["ramp_s"] + hold
    # every step was taken on a decision estimate with the decision DOF
    assert levels[0].data["decision_dof"] is None
    assert all(e.data["decision_dof"] >= spec.control.target_dof for e in levels[1:])
    assert ctl.snapshot().dof >= spec.control.target_dof
    full = next(e.t_s for e in ev if e.kind == "stage" and e.data["stage"] == "full_level")
    assert full <= 22.0  # README: "reaches full level in 21.5 s" (the block loop: 49 s)


def _true_rms_db(ctl, rig):
    from tests.benchmarks.bench_control import _expected_control_fs

    snap = ctl.snapshot()
    if snap.control_psd is None:
        return None
    true = _expected_control_fs(rig, snap.f_hz, snap.drive_psd, ctl.frame_length, ctl.fs_hz)
    e = 10 * np.log10(true / snap.target_psd)
    return snap.t_s, 10 * np.log10(true.sum() / snap.target_psd.sum()), e


@pytest.mark.parametrize(("kind", "value", "rms_s", "alarm_s", "abort_s"), [
    ("plant_gain", -3.0, 2.0, 4.0, 0.0),  # the bounds
    ("resonance_shift", 1.05, 0.5, 5.0, 1.0),
    ("resonance_shift", 0.95, 1.0, 5.0, 1.0),
])
def test_recovery_after_a_plant_change_judged_on_the_true_control(kind, value, rms_s, alarm_s,
                                                                   abort_s):
    at = 32.0  # inside full level
    spec, rig, ctl = _example(full_s=20.0, faults=(FaultSpec(kind, at, value),))
    seen = []

    def on_block(c, r):
        if at - 0.5 <= c.t_s <= at + 8 and c.status == "running":
            got = _true_rms_db(c, r)
            if got is not None:
                seen.append(got)

    _run(ctl, rig, on_block=on_block)
    assert ctl.result().status == "completed"
    alarm = spec.tolerance.alarm_db_at(ctl.f_hz)
    after = [(t, rms, e) for t, rms, e in seen if t > at]
    rms_bad = [t for t, rms, _ in after if abs(rms) > 0.5]
    line_bad = [t for t, rms, e in after if np.any(np.abs(e) > alarm) or abs(rms) > 0.5]
    assert (max(rms_bad) - at if rms_bad else 0.0) <= rms_s
    assert (max(line_bad) - at if line_bad else 0.0) <= alarm_s
    # time any line of the true control spends beyond its abort limit (one block per sample)
    abort = spec.tolerance.abort_db_at(ctl.f_hz)
    ts = [t for t, _, _ in after]
    beyond = sum(t1 - t0 for (t0, _, _), (t1, _, e) in zip(after, after[1:], strict=False)
                 if np.any(np.abs(e) > abort))
    assert beyond <= abort_s + 1e-9, beyond
    assert ts and ts[0] - at < 0.1
    if kind == "plant_gain":
        assert line_bad  # the change was seen by the true control at all


def test_an_open_loop_still_aborts_within_a_segment_and_the_ramp():
    at = 30.0
    spec, rig, ctl = _example(faults=(FaultSpec("sensor_detached", at),))
    drive = _run(ctl, rig)
    assert ctl.result().status == "aborted"
    assert ctl.trip.rule in ("loop_open", "response_silent")
    loud = np.flatnonzero(np.abs(drive) > 1e-4)
    quiet_s = (loud[-1] + 1) / spec.control.fs_hz - at
    # one segment (frame + delay) to see it, then the abort ramp; the block loop's bound was
    # one update (3 s) plus the ramp
    assert quiet_s <= spec.control.frame_length / spec.control.fs_hz + 0.1 + \
        spec.safety.abort_ramp_s


def test_no_trip_from_scatter_alone_over_ten_minutes_at_full_level():
    spec, rig, ctl = _example(full_s=600.0, seed=7)
    _run(ctl, rig)
    res = ctl.result()
    assert res.status == "completed", res.abort_reason
    assert res.verdict.verdict == "pass"


def test_every_update_record_states_its_own_dof_and_none_is_a_scrap():
    # Records are the independent safety blocks; one closed early (full level starting, the
    # test ending) has fewer segments: its DOF is stated as it is (Welch 1967 for its count),
    # and none has fewer than half the update DOF, so no record shows a few-DOF scatter as a
    # line deviation
    spec, rig, ctl = _example()
    recs = []
    resp = np.zeros(4096)
    while not ctl.finished:
        resp = rig.process(ctl.exchange(resp))
        u = ctl.last_update
        if u is not None and (not recs or recs[-1] is not u):
            recs.append(u)
    half = welch_dof(segments_for_dof(spec.control.target_dof / 2) // 2)
    assert all(r.dof >= half - 1e-9 for r in recs)
    # each record's line scatter is what its stated DOF allows (Bendat & Piersol, Random Data,
    # 4th ed., §8.5: dB scatter of a χ²_ν estimate, db_scatter_std), plus 0.5 dB for the
    # loop's own error while it equalizes [common practice allowance]: a few-DOF block
    # recorded as a full one would scatter by several dB
    for r in recs:
        dev = 10 * np.log10(np.asarray(r.control_psd) / np.asarray(r.target_psd))
        assert np.std(dev) <= 1.5 * db_scatter_std(r.dof) + 0.5, (r.index, r.dof, np.std(dev))
    assert recs[-1].decision_dof == pytest.approx(ctl.result().dof)


def test_fast_loop_drive_is_bit_reproducible_for_a_seed():
    digests = []
    for _ in range(2):
        _, rig, ctl = _example(full_s=5.0)
        digests.append(hashlib.sha256(_run(ctl, rig).tobytes()).hexdigest())
    assert digests[0] == digests[1]


def test_block_loop_is_still_available():
    spec, rig, ctl = _example(full_s=5.0, loop="block")
    _run(ctl, rig)
    assert ctl.result().status == "completed"
    assert np.median(np.diff(ctl.drive_update_times_s)) > 2.0


def test_chi2_reference_of_the_decision_window_dof():
    # Welch (1967) DOF of K Hann 50 %-overlap segments: K = 64 gives at least 120
    k = segments_for_dof(120.0)
    assert welch_dof(k) >= 120.0 > welch_dof(k - 1)
    assert stats.chi2.ppf(0.05, welch_dof(k)) > 0
