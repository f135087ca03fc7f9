"""``liveshape calibrate`` as a user types it, against a simulated card (no JACK, no device).

The command's audio rig is replaced by a fake card whose inputs see what the test wires to them:
a cable through the simulated card (the loudspeaker preset's true volts per full scale, AC
couplings and delay, :class:`liveshape.rigs.jackrig.CableModel`), nothing but noise, or a
reference exciter's sine at the sensor's true sensitivity. Checked: what the command says before
anything plays and that it waits for Enter; each plausibility refusal with the file untouched;
channels counted from 1; the calibrated values against the simulated chain's truth.

Outside references: the sine relations V_rms = V_peak / sqrt(2) and SNR = 10 log10(P_sine /
P_noise) with P_sine = A²/2 (physics of a sine); the reference exciter's 10 m/s² rms at
omega = 1000 rad/s (ISO 16063-21 comparison calibration, handheld exciters [from memory]);
g0 = 9.80665 m/s² (CGPM 1901); first-order high-pass magnitude 1/sqrt(1 + (fc/f)²).
"""

from __future__ import annotations

import io
import math
import subprocess
import sys
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest

from liveshape.cli import main
from liveshape.rigs import audio
from liveshape.rigs import calibration as cal
from liveshape.rigs.blocks import Recording
from liveshape.rigs.jackrig import CableModel
from liveshape.rigs.plant import load_plant
from liveshape.testdef import config

REPO = Path(__file__).resolve().parents[1]
FS = 48000.0
PLANT = load_plant("loudspeaker")
TRUE_OUT_V, TRUE_IN_V = PLANT.card.out_v_per_fs, PLANT.card.in_v_per_fs


class Bench:
    """What is wired to the fake card's recorded input, and a log of what happened when."""

    def __init__(self, wiring: str = "cable", *, sens_mv_per_g: float = 98.0,
                 snr_db: float | None = None) -> None:
        self.wiring, self.sens, self.snr_db = wiring, sens_mv_per_g, snr_db
        self.log: list[str] = []
        self.rigs: list[FakeCard] = []
        self.rng = np.random.default_rng(5)
        self.cable = CableModel(PLANT.card, FS, seed=2)

    def signal(self, drive: np.ndarray) -> np.ndarray:
        n = drive.size
        noise = 1e-5 * self.rng.standard_normal(n)
        if self.wiring == "cable":
            return self.cable.process(drive)
        if self.wiring == "nothing":
            return noise
        if self.wiring == "exciter":
            # 10 m/s² rms at 1000 rad/s = 10/9.80665 g rms; sensor V = S x a; FS = V / in_v
            v_rms = self.sens * 1e-3 * 10.0 / 9.80665
            amp = v_rms * math.sqrt(2) / TRUE_IN_V
            k = np.arange(n)
            x = amp * np.sin(1000.0 * k / FS + 0.3)
            if self.snr_db is not None:  # white noise of power P_sine / 10^(snr/10)
                sigma = math.sqrt(amp**2 / 2 / 10 ** (self.snr_db / 10))
                return x + sigma * self.rng.standard_normal(n)
            return x + 0.01 * noise  # a quiet input: 1e-7 FS rms
        if self.wiring == "generator":  # 0.5 V rms at 400 Hz on input 1
            return 0.5 * math.sqrt(2) / TRUE_IN_V * np.sin(2 * np.pi * 400.0 * np.arange(n) / FS)
        raise AssertionError(self.wiring)


class FakeCard:
    """The rig protocol of the calibration procedures, as AudioRig is constructed by the CLI."""

    def __init__(self, bench: Bench, index, fs_hz, *, block_size=1024, lead_blocks=4,
                 control_channel=0, loopback=None) -> None:
        self.bench, self.fs_hz, self.block_size = bench, float(fs_hz), block_size
        self.control_channel, self.loopback = control_channel, loopback
        self.played: list[np.ndarray] = []
        bench.rigs.append(self)

    def play_record(self, x, *, pad_s=0.1, tail_s=0.25):
        self.bench.log.append("play")
        d = np.concatenate([np.zeros(int(round(pad_s * FS))), np.asarray(x, float),
                            np.zeros(int(round(tail_s * FS)))])
        self.played.append(d)
        y = self.bench.signal(d).astype(np.float32)
        quiet = np.zeros_like(y)
        if self.loopback is not None:
            return Recording(FS, d.astype(np.float32), quiet, y, None)
        return Recording(FS, d.astype(np.float32), y, None, None)

    def start(self, source) -> None:
        self.bench.log.append("play")
        self.source = source
        self.played = [source.exchange(np.zeros(self.block_size)) for _ in range(60)]

    def request_stop(self, reason) -> None:
        self.source.request_stop(reason)

    def wait(self) -> None:
        while not self.source.finished:
            self.played.append(self.source.exchange(np.zeros(self.block_size)))


class Terminal(io.StringIO):
    """Keyboard input on a terminal: each line read is logged, so the log shows whether the
    Enter came before anything played."""

    def __init__(self, text: str, bench: Bench) -> None:
        super().__init__(text)
        self.bench = bench

    def isatty(self) -> bool:
        return True

    def readline(self, *args) -> str:
        line = super().readline(*args)
        self.bench.log.append("enter" if line == "\n" else f"typed {line.strip()}")
        return line


@pytest.fixture
def bench(monkeypatch: pytest.MonkeyPatch) -> Bench:
    b = Bench()
    monkeypatch.setattr(audio, "check_settings", lambda device, fs, **kw: SimpleNamespace(
        index=7, name=f"fake card {device}", **kw))
    monkeypatch.setattr(audio, "AudioRig", lambda *a, **kw: FakeCard(b, *a, **kw))
    return b


def calibrate(bench: Bench, monkeypatch, capsys, *args: str, keys: str | None = None):
    """Run ``liveshape calibrate ARGS`` in-process; ``keys`` is typed on a terminal (None: no
    terminal on stdin). Returns (status, stdout, stderr)."""
    stdin = io.StringIO("") if keys is None else Terminal(keys, bench)
    monkeypatch.setattr(sys, "stdin", stdin)
    capsys.readouterr()
    rc = main(["calibrate", *args, "--device", "3"])
    out, err = capsys.readouterr()
    return rc, out, err


def one_line(err: str) -> str:
    # the error follows the prompt (a terminal would echo the typed Enter as a newline)
    lines = [ln[ln.index("liveshape:"):] for ln in err.splitlines() if "liveshape:" in ln]
    assert len(lines) == 1, err
    assert "Traceback" not in err
    return lines[0]


# -- the walk-through of calibration/README.md -------------------------------------------------


def test_walk_through_matches_the_simulated_chain(bench, monkeypatch, capsys, tmp_path) -> None:
    f = tmp_path / "chain.yaml"
    # 1. output: the voltmeter across output 1 reads the true volts of a 0.5 FS peak sine
    reading = 0.5 * TRUE_OUT_V / math.sqrt(2)
    rc, out, err = calibrate(bench, monkeypatch, capsys, "output", "-o", str(f),
                             keys=f"\n{reading:.6f}\n")
    assert rc == 0, err
    # what the user reads, before anything plays
    assert err.startswith(
        "calibrate output:\n"
        "  plays:   a steady 400 Hz sine, 0.5 FS peak (-6.0 dBFS), on output 1 of fake card 3 "
        "until you type the voltmeter reading\n"
        "  first:   amplifier input unplugged from output 1 (or the amplifier off); a true-rms "
        "AC voltmeter across output 1\n"
        "  records: your voltmeter reading (V rms)\n"
        "  writes:  output.v_per_fs, output.channel: 1\n"
        "Press Enter when that is so (Ctrl-C stops; nothing has played yet): "
        "Playing 400 Hz at 0.5 FS on output 1. Voltmeter reading, V rms: "), err
    assert bench.log == ["enter", "play", f"typed {reading:.6f}"]
    assert f"wrote {f}" in out
    # 2. input: a cable from output 1 to input 1 (amplifier and conditioner unplugged)
    bench.log.clear()
    rc, out, err = calibrate(bench, monkeypatch, capsys, "input", "--loopback", "1:1", "-o",
                             str(f), keys="\n")
    assert rc == 0, err
    assert "plays:   a 400 Hz sine, 0.5 FS peak (-6.0 dBFS, about 0.5 V peak), for 1 s on " \
        "output 1 of fake card 3" in err
    assert "first:   amplifier input unplugged from output 1 (or the amplifier off); a cable " \
        "from output 1 to input 1 (the conditioner unplugged from input 1)" in err
    assert bench.log == ["enter", "play"]
    assert bench.rigs[-1].control_channel == 0 and bench.rigs[-1].loopback is None
    # 3. delay through the same cable
    rc, out, err = calibrate(bench, monkeypatch, capsys, "delay", "--loopback", "1:1", "-o",
                             str(f), keys="\n")
    assert rc == 0, err
    # 4. sensor on the reference exciter (true sensitivity 98 mV/g, datasheet 100 mV/g)
    bench.wiring = "exciter"
    rc, out, err = calibrate(bench, monkeypatch, capsys, "sensor", "--datasheet-mv-per-g", "100",
                             "-o", str(f), keys="\n")
    assert rc == 0, err
    assert "plays:   nothing" in err and "reference exciter (159.2 Hz, 10 m/s² rms)" in err
    data = config.read_yaml_file(f)
    # Output: the voltmeter arithmetic (V_rms sqrt 2 / level) returns the true scale; the typed
    # reading has 6 decimals.
    assert data["output"]["v_per_fs"] == pytest.approx(TRUE_OUT_V, rel=1e-5)
    # Input: 400 Hz through the card's first-order 7 Hz and 5 Hz corners keeps
    # 1/sqrt((1+(7/400)²)(1+(5/400)²)) = 0.99977 of the amplitude; noise 1e-7 FS: 0.1 % bound.
    assert data["input"]["v_per_fs"] == pytest.approx(TRUE_IN_V, rel=1e-3)
    assert data["output"]["channel"] == 1 and data["input"]["channel"] == 1
    assert data["loop_delay"] == {"samples": PLANT.card.delay_samples, "spread_samples": 0}
    # Sensor: S = V_rms / a with the calibrated input scale (0.1 % from above) and a sine at
    # -140 dBFS noise: 0.2 % bound.
    assert data["accelerometer"]["mv_per_g"] == pytest.approx(98.0, rel=2e-3)
    assert data["accelerometer"]["datasheet_mv_per_g"] == 100.0
    loaded = cal.load_calibration(f)
    assert loaded.calibrated and loaded.loop_delay_samples == PLANT.card.delay_samples


# -- waiting for Enter -------------------------------------------------------------------------


def test_without_a_terminal_nothing_plays(bench, monkeypatch, capsys, tmp_path) -> None:
    f = tmp_path / "chain.yaml"
    rc, out, err = calibrate(bench, monkeypatch, capsys, "output", "--reading", "0.35", "-o",
                             str(f), keys=None)
    assert rc == 2 and out == ""
    line = one_line(err)
    assert "stdin is not a terminal" in line and "--unattended" in line
    assert bench.rigs == [] and bench.log == [] and not f.exists()


def test_ctrl_c_at_the_prompt_stops_before_anything_plays(bench, monkeypatch, capsys,
                                                          tmp_path) -> None:
    class Interrupted(Terminal):
        def readline(self, *args) -> str:
            raise KeyboardInterrupt

    f = tmp_path / "chain.yaml"
    monkeypatch.setattr(sys, "stdin", Interrupted("", bench))
    rc = main(["calibrate", "output", "--device", "3", "-o", str(f)])
    assert rc == 130 and bench.log == [] and not f.exists()
    assert "nothing has played yet" in capsys.readouterr().err


def test_unattended_plays_without_waiting(bench, monkeypatch, capsys, tmp_path) -> None:
    f = tmp_path / "chain.yaml"
    rc, out, err = calibrate(bench, monkeypatch, capsys, "output", "--reading", "0.35",
                             "--unattended", "-o", str(f), keys=None)
    assert rc == 0, err
    assert "--unattended: going on without waiting" in err and bench.log == ["play"]
    # 0.35 V rms at 0.5 FS peak: 0.35 sqrt 2 / 0.5 V/FS
    assert config.read_yaml_file(f)["output"]["v_per_fs"] == pytest.approx(0.7 * math.sqrt(2))
    rc, out, err = calibrate(bench, monkeypatch, capsys, "output", "--unattended", "-o",
                             str(tmp_path / "x.yaml"), keys=None)
    assert rc == 2 and "--reading" in one_line(err)


def test_no_terminal_refused_in_a_real_process(tmp_path: Path) -> None:
    # As a script would call it: stdin from /dev/null, a device that does not exist. The refusal
    # comes before the device is even looked up.
    f = tmp_path / "chain.yaml"
    proc = subprocess.run([sys.executable, "-m", "liveshape", "calibrate", "output",
                           "--device", "no-such-card", "-o", str(f)],
                          stdin=subprocess.DEVNULL, capture_output=True, text=True, cwd=REPO,
                          timeout=120)
    assert proc.returncode == 2
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "stdin is not a terminal" in lines[0], proc.stderr
    assert not f.exists()


# -- channels ----------------------------------------------------------------------------------


@pytest.mark.parametrize("text", ["0:1", "2:0", "0:0"])
def test_channel_zero_is_a_one_line_error(bench, monkeypatch, capsys, tmp_path, text) -> None:
    f = tmp_path / "chain.yaml"
    rc, out, err = calibrate(bench, monkeypatch, capsys, "delay", "--loopback", text, "-o",
                             str(f), keys="\n")
    assert rc == 2
    line = one_line(err)
    assert f"--loopback = {text!r}" in line and "count from 1" in line
    assert bench.rigs == [] and not f.exists()


def test_channels_count_from_one(bench, monkeypatch, capsys, tmp_path) -> None:
    # --loopback 2:3: a cable from the second output to the third input. The card gets a copy
    # of the drive on output index 1 and is read on input index 2 (zero-based inside).
    f = tmp_path / "chain.yaml"
    config.write_yaml_file(f, {"liveshape_calibration": 1, "output": {"v_per_fs": TRUE_OUT_V}})
    rc, out, err = calibrate(bench, monkeypatch, capsys, "input", "--loopback", "2:3", "-o",
                             str(f), keys="\n")
    assert rc == 0, err
    assert bench.rigs[-1].loopback == (1, 2)
    assert "on outputs 1 and 2 of fake card 3" in err and "cable from output 2 to input 3" in err
    assert config.read_yaml_file(f)["input"]["channel"] == 3


def test_channel_zero_in_the_file_is_refused(tmp_path) -> None:
    f = tmp_path / "chain.yaml"
    f.write_text("liveshape_calibration: 1\noutput: {v_per_fs: 2, channel: 0}\n"
                 "input: {v_per_fs: 4}\naccelerometer: {mv_per_g: 100}\n")
    with pytest.raises(Exception, match=r"output.channel = 0 must be >= 1 \(channels count"):
        cal.load_calibration(f)


# -- refusals: one line, exit 2, the file as it was ----------------------------------------------


def started_file(tmp_path: Path) -> tuple[Path, bytes]:
    f = tmp_path / "chain.yaml"
    config.write_yaml_file(f, {"liveshape_calibration": 1,
                               "output": {"v_per_fs": TRUE_OUT_V, "channel": 1},
                               "input": {"v_per_fs": TRUE_IN_V, "channel": 1}})
    return f, f.read_bytes()


@pytest.mark.parametrize(
    ("wiring", "sens", "args", "words"),
    [
        # no exciter: the sine fit finds no 159.2 Hz sine
        ("nothing", 98.0, (), ["no 159.2 Hz signal found on input 1: SNR"]),
        # a sensor of 0.05 mV/g does not exist (0.1-10000 mV/g)
        ("exciter", 0.05, (), ["sensor sensitivity = 0.05", "outside 0.1-10000 mV/g"]),
        ("exciter", 20000.0, (), ["sensor sensitivity = 2e+04", "outside 0.1-10000 mV/g"]),
        # 130 mV/g against a 100 mV/g datasheet: +30 %
        ("exciter", 130.0, ("--datasheet-mv-per-g", "100"),
         ["+30.0 % from the datasheet's 100 mV/g", "--accept-deviation"]),
    ],
)
def test_sensor_refusals_leave_the_file(bench, monkeypatch, capsys, tmp_path, wiring, sens,
                                        args, words) -> None:
    f, before = started_file(tmp_path)
    bench.wiring, bench.sens = wiring, sens
    rc, out, err = calibrate(bench, monkeypatch, capsys, "sensor", *args, "-o", str(f),
                             keys="\n")
    assert rc == 2 and out == ""
    line = one_line(err)
    for w in words:
        assert w in line, line
    assert line.endswith(f"{f} left as it was")
    assert f.read_bytes() == before


def test_confirmed_deviation_is_written(bench, monkeypatch, capsys, tmp_path) -> None:
    f, _ = started_file(tmp_path)
    bench.wiring, bench.sens = "exciter", 130.0
    rc, out, err = calibrate(bench, monkeypatch, capsys, "sensor", "--datasheet-mv-per-g", "100",
                             "--accept-deviation", "-o", str(f), keys="\n")
    assert rc == 0, err
    assert config.read_yaml_file(f)["accelerometer"]["mv_per_g"] == pytest.approx(130, rel=2e-3)


def test_snr_in_the_refusal_is_the_signal_to_noise_ratio(bench, monkeypatch, capsys,
                                                          tmp_path) -> None:
    # A 159.2 Hz sine buried in white noise at 3 dB SNR (noise power = sine power / 10^0.3):
    # the refusal names 3 dB (the fit's residual is the noise: 96000 samples, scatter ~0.02 dB).
    f, before = started_file(tmp_path)
    bench.wiring, bench.snr_db = "exciter", 3.0
    rc, out, err = calibrate(bench, monkeypatch, capsys, "sensor", "-o", str(f), keys="\n")
    assert rc == 2
    assert "no 159.2 Hz signal found on input 1: SNR 3 dB" in one_line(err)
    assert f.read_bytes() == before


def test_input_without_the_cable_is_refused(bench, monkeypatch, capsys, tmp_path) -> None:
    f, before = started_file(tmp_path)
    bench.wiring = "nothing"
    rc, out, err = calibrate(bench, monkeypatch, capsys, "input", "--loopback", "1:1", "-o",
                             str(f), keys="\n")
    assert rc == 2
    assert "no 400.0 Hz signal found on input 1: SNR" in one_line(err)
    assert f.read_bytes() == before


def test_delay_without_the_cable_is_refused(bench, monkeypatch, capsys, tmp_path) -> None:
    f, before = started_file(tmp_path)
    bench.wiring = "nothing"
    rc, out, err = calibrate(bench, monkeypatch, capsys, "delay", "--loopback", "1:1", "-o",
                             str(f), keys="\n")
    assert rc == 2
    line = one_line(err)
    assert "loop delay on input 1" in line and "spread" in line
    assert f.read_bytes() == before


@pytest.mark.parametrize("reading", ["700", "0.002"])
def test_implausible_voltmeter_reading_writes_nothing(bench, monkeypatch, capsys, tmp_path,
                                                      reading) -> None:
    # 700 V rms at 0.5 FS is 1980 V/FS (a reading in mV typed as V); 0.002 V rms is 0.0057 V/FS:
    # both outside 0.01-100 V/FS.
    f = tmp_path / "chain.yaml"
    rc, out, err = calibrate(bench, monkeypatch, capsys, "output", "-o", str(f),
                             keys=f"\n{reading}\n")
    assert rc == 2
    line = one_line(err)
    assert "outside 0.01-100 V/FS" in line and line.endswith(f"{f} not written")
    assert not f.exists()


def test_input_scale_outside_the_range_is_refused(bench, monkeypatch, capsys, tmp_path) -> None:
    # The output calibrated at 0.001 V/FS (the file says so, wrongly): a 0.5 FS sine is then
    # taken for 0.35 mV rms, recorded at 0.5 FS peak through the cable (the true cable gain is
    # out_v / in_v = 1): 0.001 V/FS for the input.
    f = tmp_path / "chain.yaml"
    config.write_yaml_file(f, {"liveshape_calibration": 1, "output": {"v_per_fs": 0.001}})
    before = f.read_bytes()
    rc, out, err = calibrate(bench, monkeypatch, capsys, "input", "--loopback", "1:1", "-o",
                             str(f), keys="\n")
    assert rc == 2 and "outside 0.01-100 V/FS" in one_line(err)
    assert f.read_bytes() == before


def test_known_voltage_plays_nothing(bench, monkeypatch, capsys, tmp_path) -> None:
    # A generator's 0.5 V rms sine on input 1: V/FS = V_rms sqrt 2 / recorded amplitude.
    f = tmp_path / "chain.yaml"
    bench.wiring = "generator"
    rc, out, err = calibrate(bench, monkeypatch, capsys, "input", "--known-v", "0.5", "-o",
                             str(f), keys="\n")
    assert rc == 0, err
    assert "plays:   nothing" in err and "a 400 Hz sine (within 2 %) of 0.5 V rms" in err
    assert all(not np.any(d) for d in bench.rigs[-1].played)  # the drive stayed silent
    assert config.read_yaml_file(f)["input"]["v_per_fs"] == pytest.approx(TRUE_IN_V, rel=1e-6)


def test_delay_through_the_chain_asks_for_the_gain_low(bench, monkeypatch, capsys,
                                                       tmp_path) -> None:
    f = tmp_path / "chain.yaml"
    rc, out, err = calibrate(bench, monkeypatch, capsys, "delay", "-o", str(f), keys="\n")
    assert rc == 0, err
    assert "through the amplifier to the shaker" in err
    assert "first:   amplifier gain low (the bursts drive the shaker)" in err
    assert bench.log == ["enter", "play"]


def test_sensor_on_another_input_is_written_under_inputs(bench, monkeypatch, capsys, tmp_path):
    # a monitor accelerometer (true 98 mV/g, as the bench's exciter wiring) on input 3; the
    # chain's own sensor entry stays as it was
    f = tmp_path / "rig.yaml"
    config.write_yaml_file(f, {"liveshape_calibration": cal.SCHEMA_VERSION,
                               "output": {"v_per_fs": TRUE_OUT_V},
                               "input": {"v_per_fs": TRUE_IN_V},
                               "accelerometer": {"mv_per_g": 100.0}})
    bench.wiring = "exciter"
    rc, out, err = calibrate(bench, monkeypatch, capsys, "sensor", "--input", "3", "-o", str(f),
                             keys="\n")
    assert rc == 0, err
    assert "the conditioner on input 3" in err and "2 s on input 3" in err
    assert bench.rigs[-1].control_channel == 2 and bench.rigs[-1].loopback is None
    data = config.read_yaml_file(f)
    assert data["accelerometer"] == {"mv_per_g": 100.0}
    (entry,) = data["inputs"]
    # S = V_rms / a with the card's input scale: the same 0.2 % bound as the control's sensor
    assert entry["channel"] == 3 and entry["v_per_fs"] == pytest.approx(TRUE_IN_V)
    assert entry["mv_per_g"] == pytest.approx(98.0, rel=2e-3)
    loaded = cal.load_calibration(f)
    assert loaded.g_per_fs_at(3) == pytest.approx(TRUE_IN_V / 0.098, rel=2e-3)
    # again: the entry is replaced, not repeated
    rc, _, err = calibrate(bench, monkeypatch, capsys, "sensor", "--input", "3", "-o", str(f),
                           keys="\n")
    assert rc == 0, err
    assert len(config.read_yaml_file(f)["inputs"]) == 1
    rc, _, err = calibrate(bench, monkeypatch, capsys, "delay", "--input", "3", "--loopback",
                           "1:1", "-o", str(f), keys="\n")
    assert rc == 2 and "--input is for the sensor step only" in err
