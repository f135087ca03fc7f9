"""The survey with several inputs: every input's FRF from the drive, the transmissibility of a
monitor over the control, the reference's output gain, the compare input by input, and
``run --survey`` (a survey before and after a run, compared) end to end.

Outside references: the base-excitation transmissibility of a single-degree-of-freedom system,
|T| = sqrt((1 + (2ζr)²)/((1 − r²)² + (2ζr)²)), ζ = 1/(2Q) (S. S. Rao, *Mechanical Vibrations*,
5th ed., §3.6), evaluated by scipy.signal.freqs; the bilinear transform's frequency warping
f' = (fs/π) tan(π f/fs) (Oppenheim & Schafer, *Discrete-Time Signal Processing*, 3rd ed., §7.2);
the random error of an H1 magnitude, ε = sqrt(1 − γ²)/(|γ| sqrt(2 n_d)) (Bendat & Piersol,
*Random Data*, 4th ed., Table 9.6); first-order Butterworth high-passes by scipy.signal.butter.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.signal

from liveshape.dsp.resonance import find_resonances, h1_magnitude_error
from liveshape.record.surveyfile import read_survey
from liveshape.rigs.plantmodel import mode_transmissibility_tf
from liveshape.session import build_sim_rig, run_survey, survey_settings
from liveshape.testdef.spec import FaultSpec, load_spec

REPO = Path(__file__).resolve().parents[1]
EXAMPLE = REPO / "examples" / "handlebar-nav-unit.yaml"
FS = 48_000.0
DF = FS / 32768
INPUTS = """  inputs:
    - {channel: 1, role: control, name: table}
    - {channel: 2, role: monitor, name: bracket}
    - {channel: 3, role: reference, name: loop}
"""


def spec_file(folder: Path, *, low: bool = False) -> Path:
    """The example test with the loudspeaker's table as control, its payload resonance
    ``bracket`` (350 Hz, Q 15) as a monitor and the drive's loopback as the reference; ``low``:
    the profile 10 dB down, so that the bracket (about 24 dB above the table at 350 Hz) stays
    inside the input's full scale during a run."""
    text = EXAMPLE.read_text()
    text = text.replace("  plant: loudspeaker\n", "  plant: loudspeaker\n" + INPUTS)
    if low:
        text = text.replace("asd: 0.0005}", "asd: 0.00005}").replace("asd: 0.002}",
                                                                      "asd: 0.0002}")
    path = folder / "with-inputs.yaml"
    path.write_text(text)
    return path


def survey(folder: Path, seed: int, shift: float | None = None):
    faults = [] if shift is None else [FaultSpec("resonance_shift", 0.0, shift)]
    spec = load_spec(spec_file(folder), {"faults": faults})
    settings = survey_settings(spec, seed=seed)
    result, root = run_survey(spec, settings, out_dir=folder / "out")
    return spec, result, root


@pytest.fixture(scope="module")
def before(tmp_path_factory):
    return survey(tmp_path_factory.mktemp("svy"), 3)


def transmissibility(spec, f_hz: np.ndarray) -> np.ndarray:
    """The bracket over the table by scipy.signal.freqs, at the bilinear-warped frequency (the
    simulated rig discretizes the mode by the bilinear transform)."""
    rig, _, _ = build_sim_rig(spec, 0)
    warped = FS / np.pi * np.tan(np.pi * f_hz / FS)
    _, t = scipy.signal.freqs(*mode_transmissibility_tf(rig.plant, 0), worN=2 * np.pi * warped)
    return t


def test_every_input_is_surveyed_and_recorded(before):
    spec, res, root = before
    assert res.status == "completed"
    assert [(r.name, r.role) for r in res.inputs] == [("table", "control"),
                                                      ("bracket", "monitor"),
                                                      ("loop", "reference")]
    table, bracket, loop = res.inputs
    assert table.resonances == res.resonances and table.trans is None
    z = np.load(root / "frf.npz")
    for key in ("input_bracket_h1", "input_bracket_coherence", "input_bracket_trans",
                "input_bracket_trans_coherence", "input_loop_h1", "input_table_h1"):
        assert key in z.files
    np.testing.assert_array_equal(z["input_bracket_trans"], bracket.trans)
    head = (root / "inputs.csv").read_text().splitlines()[0].split(",")
    assert {"bracket_h1_mag_g_per_fs", "bracket_trans_mag", "loop_h1_mag_fs_per_fs"} <= set(head)
    rec = read_survey(root)
    assert list(rec.inputs) == ["table", "bracket", "loop"]
    assert rec.inputs["bracket"]["resonances"] == bracket.resonances
    assert rec.inputs["bracket"]["trans_resonances"] == bracket.trans_resonances
    meta = json.loads((root / "survey.json").read_text())
    assert [e["name"] for e in meta["inputs"]] == ["table", "bracket", "loop"]
    # what `survey SPEC` prints: every resonance row names its input
    from liveshape.views.surveytext import survey_lines

    lines = survey_lines(res, root, survey_settings(spec, seed=3))
    assert sum(ln.startswith("bracket ") for ln in lines) == len(bracket.resonances)
    assert sum(ln.startswith("bracket/T ") for ln in lines) == len(bracket.trans_resonances)
    assert any(ln.startswith("loop ") and "output gain" in ln for ln in lines)


def test_the_monitors_transmissibility_follows_the_base_excitation_formula(before):
    spec, res, _ = before
    bracket = res.inputs[1]
    t = transmissibility(spec, res.f_hz)
    # cross-check of the reference itself: scipy's |T| is Rao's closed form (at the same
    # warped frequency)
    r, zeta = FS / np.pi * np.tan(np.pi * res.f_hz / FS) / 350.0, 1 / 30.0
    rao = np.sqrt((1 + (2 * zeta * r) ** 2) / ((1 - r**2) ** 2 + (2 * zeta * r) ** 2))
    np.testing.assert_allclose(np.abs(t), rao, rtol=1e-9)
    # per line: 4 ε of the H1 magnitude (Bendat & Piersol Table 9.6, at the survey's Welch DOF)
    # plus 0.05 dB for the resolution bias of a Q-15 peak on 1.46 Hz Hann lines: with the
    # half-power width B = 23 Hz and the Hann noise bandwidth Be = 1.5 df = 2.2 Hz the bias is
    # about (1/3)(Be/B)² = 0.3 % (Bendat & Piersol, Random Data, 4th ed., §8.5.1 [from memory])
    good = bracket.trans_coherence >= 0.8
    assert np.count_nonzero(good) > 0.9 * good.size
    err_db = 20 * np.log10(np.abs(bracket.trans[good]) / np.abs(t[good]))
    eps = h1_magnitude_error(bracket.trans_coherence[good], res.dof)
    bound = 4 * 8.686 * eps + 0.05
    assert np.all(np.abs(err_db) < bound), float(np.max(np.abs(err_db) - bound))
    # the peak: where scipy's |T| peaks on a 0.01 Hz grid; |T| of Rao's formula peaks at
    # r = sqrt(sqrt(1 + 8ζ²) − 1)/(2ζ) (setting d|T|²/dr = 0), here in warped frequency
    fine = np.arange(300.0, 400.0, 0.01)
    f_peak = float(fine[np.argmax(np.abs(transmissibility(spec, fine)))])
    rao_peak = 350.0 * math.sqrt(math.sqrt(1 + 8 * zeta**2) - 1) / (2 * zeta)
    assert f_peak == pytest.approx(FS / math.pi * math.atan(math.pi * rao_peak / FS), abs=0.01)
    (peak,) = bracket.trans_resonances
    assert abs(peak.f_hz - f_peak) <= DF, (peak, f_peak)
    assert peak.q == pytest.approx(15.0, rel=0.1)


def test_the_monitors_frf_from_the_drive_has_the_bracket_resonance(before):
    spec, res, _ = before
    bracket = res.inputs[1]
    rig, cal, _ = build_sim_rig(spec, 0)
    # truth: the table's FRF (drive FS -> g) times the bracket's transmissibility (scipy.freqs)
    f = np.arange(20.0, 1000.0, 0.01)
    h = rig.frf(f) * cal.g_per_fs * transmissibility(spec, f)
    truth = [r for r in find_resonances(f, h, np.ones(f.size), 1e9, band_hz=(20, 1000))
             if r.kind == "peak"]
    got = [r for r in bracket.resonances if r.kind == "peak"]
    assert len(truth) == len(got) == 1
    t, r = truth[0], got[0]
    # within the line spacing plus 3σ of the estimate, the level within 0.3 dB + 3σ
    assert abs(r.f_hz - t.f_hz) <= DF + 3 * r.f_sigma_hz, (t, r)
    assert r.level_db == pytest.approx(t.level_db, abs=0.3 + 3 * r.level_sigma_db)
    assert r.q == pytest.approx(t.q, rel=0.1)


def test_the_reference_gives_the_cards_output_gain(before):
    _, res, root = before
    loop = res.inputs[2]
    assert loop.role == "reference" and loop.units == "FS/FS" and loop.resonances == ()
    # the loudspeaker card: 1 V/FS out and in, first-order 7 Hz output and 5 Hz input couplings
    # (scipy.signal.butter); the cable passes volts, so drive FS per FS is their product
    sos = np.vstack([scipy.signal.butter(1, fc, "highpass", fs=FS, output="sos")
                     for fc in (7.0, 5.0)])
    _, hp = scipy.signal.sosfreqz(sos, worN=res.f_hz, fs=FS)
    err_db = 20 * np.log10(np.abs(loop.h1) / np.abs(hp))
    eps = h1_magnitude_error(loop.coherence, res.dof)
    assert np.all(np.abs(err_db) < 4 * 8.686 * eps + 0.01)
    meta = json.loads((root / "survey.json").read_text())["inputs"][2]
    assert meta["output_gain_median_db"] == pytest.approx(0.0, abs=0.05)


@pytest.mark.parametrize("shift, flagged", [(1.03, True), (1.005, False)])
def test_compare_flags_a_3pct_shift_on_the_monitor_not_a_half_pct_one(before, tmp_path, shift,
                                                                       flagged):
    from liveshape.control.survey import compare_inputs

    _, _, b = before
    _, _, a = survey(tmp_path, 4, shift)
    groups = dict(compare_inputs(read_survey(b), read_survey(a)))
    assert set(groups) == {"table", "bracket", "bracket/T", "loop"}
    assert groups["loop"] == ()
    for name in ("bracket", "bracket/T"):
        (c,) = groups[name]
        assert c.after is not None
        assert bool(c.flagged) is flagged
    # the transmissibility peak is the bracket's own mode: it moves by the fault's factor; the
    # monitor's peak from the drive is a mode of table and payload together, which moves by
    # about as much (both within 0.6 %, the bound of the one-input compare test)
    for name in ("bracket", "bracket/T"):
        assert groups[name][0].shift_pct == pytest.approx(100 * (shift - 1), abs=0.6)


def cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "liveshape", *args], capture_output=True,
                          text=True, cwd=REPO, timeout=600)


def test_cli_compare_names_the_input(before, tmp_path):
    _, _, b = before
    _, _, a = survey(tmp_path, 4, 1.03)
    p = cli("survey", "--compare", str(b), str(a))
    assert p.returncode == 5, p.stderr
    rows = [ln for ln in p.stdout.splitlines() if "FLAG" in ln]
    assert any(ln.startswith("bracket ") for ln in rows)
    assert any(ln.startswith("bracket/T ") for ln in rows)


def folders(out: Path) -> tuple[list[Path], list[Path]]:
    """Run folders and survey folders under ``out`` (a folder made in the same second as
    another gets ``-2``: tell them by their files)."""
    runs = sorted(p for p in out.iterdir() if (p / "run.json").is_file())
    surveys = sorted(p for p in out.iterdir() if (p / "survey.json").is_file())
    assert len(runs) + len(surveys) == len(list(out.iterdir()))
    return runs, surveys


def test_run_survey_before_and_after_without_a_fault(tmp_path):
    p = cli("run", str(EXAMPLE), "--fast", "--survey", "--duration", "4", "--out", str(tmp_path))
    assert p.returncode == 0, p.stderr
    assert "compare of the surveys before and after the run" in p.stdout
    assert "0 change(s) flagged" in p.stdout
    (run,), surveys = folders(tmp_path)
    assert len(surveys) == 2
    note = json.loads((run / "surveys.json").read_text())
    assert {note["before"], note["after"]} == {str(s) for s in surveys}
    surveys = [Path(note["before"]), Path(note["after"])]
    assert note["compare"]["flagged"] == 0
    events = [json.loads(ln) for ln in (run / "events.jsonl").read_text().splitlines()]
    assert events[0]["kind"] == "survey_before"
    assert events[0]["data"]["folder"] == str(surveys[0])
    first, second = (json.loads((s / "survey.json").read_text()) for s in surveys)
    assert second["run_dir"] == str(run)
    # the second survey draws new noise: the simulated rig would otherwise repeat the first
    assert second["settings"]["seed"] == first["settings"]["seed"] + 1


def test_run_survey_is_refused_with_a_bring_up_hold(tmp_path):
    p = cli("run", str(EXAMPLE), "--fast", "--survey", "--bring-up", "--out", str(tmp_path))
    lines = [ln for ln in p.stderr.splitlines() if ln.strip()]
    assert p.returncode == 2 and len(lines) == 1 and "--unattended" in lines[0], p.stderr
    assert not any(tmp_path.iterdir())


def test_run_survey_flags_a_shift_that_happens_during_the_run(tmp_path):
    # the fault starts 10 s into the run (in the ramp-up); the survey before the run meets no
    # fault, the survey after it the plant as the run left it: the bracket 3 % higher
    spec = spec_file(tmp_path, low=True)
    p = cli("run", str(spec), "--fast", "--survey", "--duration", "4", "--json",
            "--fault", "resonance_shift@10=1.03", "--out", str(tmp_path / "out"))
    assert p.returncode == 5, p.stderr
    data = json.loads(p.stdout)
    assert data["status"] == "completed" and data["exit_status"] == 0
    groups = {g["input"]: g for g in data["surveys"]["compare"]["inputs"]}
    assert groups["bracket/T"]["flagged"] == 1
    assert groups["bracket/T"]["changes"][0]["shift_pct"] == pytest.approx(3.0, abs=0.6)


def test_no_survey_after_an_aborted_run(tmp_path):
    p = cli("run", str(EXAMPLE), "--fast", "--survey", "--duration", "4", "--out", str(tmp_path),
            "--fault", "sensor_detached@12")
    assert p.returncode not in (0, 5) and "Traceback" not in p.stderr
    said = [ln for ln in p.stderr.splitlines() if "no survey after the run" in ln]
    assert len(said) == 1
    (run,), surveys = folders(tmp_path)
    assert len(surveys) == 1
    assert json.loads((run / "surveys.json").read_text())["after"] is None
    # the exit status is the run's own
    assert p.returncode == json.loads((run / "summary.json").read_text())["exit_status"]


def test_a_card_survey_reads_every_input_in_list_order(tmp_path, monkeypatch):
    # a fake card (tests/test_audio_inputs.py) puts a level of its own on every card input, so
    # each input's rms tells which card channel its column came from
    import types

    from test_audio_inputs import CARD, ChannelStream, FakePortAudioError, FakeStop, pattern

    from liveshape.rigs import audio, devices

    ChannelStream.instances = []
    monkeypatch.setattr(audio, "import_sounddevice", lambda: types.SimpleNamespace(
        Stream=ChannelStream, CallbackStop=FakeStop, PortAudioError=FakePortAudioError))
    monkeypatch.setattr(audio, "check_settings", lambda device, fs, **kw: devices.check_settings(
        None, device, fs, devices=[CARD], **kw))
    text = EXAMPLE.read_text().replace(
        "rig:\n  kind: sim\n  plant: loudspeaker\n",
        "rig:\n  kind: audio\n  device: four\n  uncalibrated: true\n  inputs:\n"
        "    - {channel: 3, role: control, name: table}\n"
        "    - {channel: 1, role: monitor, name: bracket}\n"
        "    - {channel: 2, role: reference, name: loop}\n")
    (tmp_path / "a.yaml").write_text(text)
    spec = load_spec(tmp_path / "a.yaml")
    settings = survey_settings(spec, duration_s=1.0, frame_length=4096)
    res, root = run_survey(spec, settings, out_dir=tmp_path / "out")
    assert ChannelStream.instances[-1].n_in == 3  # card inputs 3, 1 and 2
    assert [r.name for r in res.inputs] == ["table", "bracket", "loop"]
    for r, card_input in zip(res.inputs, (3, 1, 2), strict=True):
        expect = float(np.sqrt(np.mean(pattern(card_input - 1, np.arange(1024)) ** 2.0)))
        assert r.response_rms_fs == pytest.approx(expect, rel=5e-3), r.name
    meta = json.loads((root / "survey.json").read_text())
    assert [(e["channel"], e["role"]) for e in meta["rig"]["inputs"]] == [
        (3, "control"), (1, "monitor"), (2, "reference")]
    # calibrated, the monitor needs its own mV/g: refused in one line before the card is opened
    from liveshape.errors import ConfigError
    from liveshape.rigs.calfile import write_calibration
    from liveshape.testdef.chain import ChainCalibration

    cal_path = tmp_path / "chain.yaml"
    write_calibration(cal_path, ChainCalibration(source="file"))
    spec = load_spec(tmp_path / "a.yaml", overrides={"rig.uncalibrated": "false",
                                                      "rig.calibration": str(cal_path)})
    opened = len(ChannelStream.instances)
    with pytest.raises(ConfigError, match=r"monitor input 1 \(bracket\)"):
        run_survey(spec, settings, out_dir=tmp_path / "out2")
    assert len(ChannelStream.instances) == opened and not (tmp_path / "out2").exists()


@pytest.mark.jack
def test_a_survey_of_several_inputs_through_jack(jack_server, tmp_path):
    """The survey through a real audio server: control, the bracket's monitor and a loopback as
    three capture ports of the virtual rig, read as one (samples, 3) stream."""
    from jackserver import virtual_rig

    from liveshape.rigs.calfile import write_calibration

    fs = int(jack_server.fs_hz)
    inputs = ((1, "control"), (2, "mode:bracket"), (3, "reference"))
    with virtual_rig("loudspeaker", seed=7, inputs=inputs, loopback=False) as vr:
        cal_path = tmp_path / "chain.yaml"
        write_calibration(cal_path, vr.processor.calibration)
        text = EXAMPLE.read_text().replace(
            "rig:\n  kind: sim\n  plant: loudspeaker\n",
            f"rig:\n  kind: audio\n  device: liveshape-plant\n  calibration: {cal_path}\n"
            "  inputs:\n    - {channel: 1, role: control, name: table}\n"
            "    - {channel: 2, role: monitor, name: bracket}\n"
            "    - {channel: 3, role: reference, name: loop}\n")
        (tmp_path / "j.yaml").write_text(text)
        spec = load_spec(tmp_path / "j.yaml")
        assert spec.control.fs_hz == fs
        settings = survey_settings(spec, duration_s=6.0, frame_length=8192, seed=3)
        res, root = run_survey(spec, settings, out_dir=tmp_path / "out")
    assert res.status == "completed"
    table, bracket, loop = res.inputs
    # the bracket's base-excitation transmissibility peaks at its fixed-base mode, 350 Hz with
    # Q 15 (Rao, Mechanical Vibrations, 5th ed., §3.6), within two 5.9 Hz lines
    peaks = [r for r in bracket.trans_resonances if r.kind == "peak"]
    assert peaks and min(abs(r.f_hz - 350.0) for r in peaks) < 2 * FS / 8192
    # a loopback copies the drive: the card's output gain is 0 dB above its couplings
    meta = json.loads((root / "survey.json").read_text())["inputs"][2]
    assert meta["output_gain_median_db"] == pytest.approx(0.0, abs=0.1)
