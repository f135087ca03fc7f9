"""The command line: exit statuses, one-line errors, JSON keys.

Numbers printed by ``check --json`` are compared with published values (NAVMAT P-9492) so the
command is tested end to end, not just for shape.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from liveshape.cli import main

REPO = Path(__file__).resolve().parents[1]
EXAMPLES = REPO / "examples"


def run_cli(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess[str]:
    """Run ``python -m liveshape`` in a subprocess, as a user would."""
    return subprocess.run(
        [sys.executable, "-m", "liveshape", *args],
        capture_output=True,
        text=True,
        cwd=cwd or REPO,
        timeout=300,
    )


def assert_one_line_error(proc: subprocess.CompletedProcess[str], *words: str) -> None:
    assert proc.returncode == 2, proc.stderr
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, proc.stderr
    assert "Traceback" not in proc.stderr
    for w in words:
        assert w in lines[0], lines[0]


NAVMAT_CSV = """# NAVMAT P-9492 screening spectrum (published: 6.0 grms)
f_hz, asd_g2_hz
20, 0.01
80, 0.04
350, 0.04
2000, 0.007
"""


def test_check_json_navmat(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    p = tmp_path / "navmat.csv"
    p.write_text(NAVMAT_CSV)
    assert main(["check", str(p), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    for key in ("grms_g", "velocity_rms_m_s", "displacement_rms_m", "displacement_pp_3sigma_m",
                "f_min_hz", "f_max_hz"):
        assert key in data
    # NAVMAT P-9492: published 6.0 grms; exact integral of the breakpoints 6.06 (DOMAIN.md §1).
    assert data["grms_g"] == pytest.approx(6.06, abs=0.01)
    # 3-sigma peak-to-peak is 6 x rms (common practice; MIL-STD-810H 3-sigma basis).
    assert data["displacement_pp_3sigma_m"] == pytest.approx(6 * data["displacement_rms_m"])
    assert data["f_min_hz"] == 20 and data["f_max_hz"] == 2000


def test_check_table_names_band_and_grms(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(EXAMPLES / "handlebar-nav-unit.yaml")]) == 0
    out = capsys.readouterr().out
    assert "grms" in out and "20" in out and "1000" in out and "DOF" in out


def test_seconds_for_dof_matches_welch_dof() -> None:
    # Welch (1967): Hann 50 % adds 36/19 DOF per segment for many segments; 120 DOF needs
    # ceil((120 - c) / (36/19)) segments, about 64 (DOMAIN.md §3).
    from liveshape.control.checks import segments_for_dof
    from liveshape.dsp.spectra import welch_dof

    k = segments_for_dof(120.0)
    assert welch_dof(k) >= 120.0 > welch_dof(k - 1)
    assert 62 <= k <= 65


@pytest.mark.parametrize(
    "content, words",
    [
        ("f_hz, asd_g2_hz\n20, 0.01\n", ["bad.csv"]),                       # fewer than 2 points
        ("f_hz, asd_g2_hz\n20, 0.01\n20, 0.02\n", ["bad.csv", "line"]),     # duplicate frequency
        ("f_hz, asd_g2_hz\n20, 0.01\n80, -0.02\n", ["bad.csv", "line"]),    # negative level
        ("f_hz, asd_g2_hz\n20, 0.01\n80, x\n", ["bad.csv", "line"]),        # not a number
    ],
)
def test_check_bad_csv_is_one_line(tmp_path: Path, content: str, words: list[str]) -> None:
    p = tmp_path / "bad.csv"
    p.write_text(content)
    assert_one_line_error(run_cli("check", str(p)), *words)


def test_check_misspelled_key_suggests(tmp_path: Path) -> None:
    p = tmp_path / "typo.yaml"
    text = (EXAMPLES / "handlebar-nav-unit.yaml").read_text()
    p.write_text(text.replace("tolerance:", "tolerence:"))
    assert_one_line_error(run_cli("check", str(p)), "typo.yaml", "tolerence", "tolerance")


def test_check_malformed_yaml(tmp_path: Path) -> None:
    p = tmp_path / "broken.yaml"
    p.write_text("name: [unclosed\n")
    assert_one_line_error(run_cli("check", str(p)), "broken.yaml", "line")


def test_check_fmax_above_nyquist_names_fs() -> None:
    proc = run_cli("check", str(EXAMPLES / "handlebar-nav-unit.yaml"), "--fs", "1500")
    assert_one_line_error(proc, "1500")


def test_bad_rig_option() -> None:
    proc = run_cli("check", str(EXAMPLES / "handlebar-nav-unit.yaml"), "--rig", "lab")
    assert_one_line_error(proc, "--rig", "lab")


def test_missing_file() -> None:
    assert_one_line_error(run_cli("check", "no-such-file.yaml"), "no-such-file.yaml")


def test_synth_json_and_sidecar(tmp_path: Path) -> None:
    out = tmp_path / "drive.wav"
    proc = run_cli("synth", str(EXAMPLES / "handlebar-nav-unit.yaml"), "--duration", "12",
                   "-o", str(out), "--seed", "5", "--json")
    assert proc.returncode == 0, proc.stderr
    data = json.loads(proc.stdout)
    for key in ("path", "fs_hz", "duration_s", "seed", "full_scale_g", "rms_g", "crest_factor",
                "kurtosis", "tries", "psd_check"):
        assert key in data
    assert json.loads(out.with_suffix(".json").read_text()) == data
    import soundfile as sf

    x, fs = sf.read(out)
    assert fs == 48000 and x.size == 12 * 48000
    # sample x full_scale_g is acceleration in g: its rms is the profile grms (1.107 g, exact
    # integral of the example's breakpoints) within the chi-square scatter of 12 s of data
    # (well under 5 % for ~440 DOF per line over ~160 lines; common practice bound).
    grms = float((x * data["full_scale_g"]).std())
    assert grms == pytest.approx(1.107, rel=0.05)
    assert grms == pytest.approx(data["rms_g"], rel=1e-5)
    # Gaussian drive with clipping at 4 sigma: kurtosis a little below 3 (normal distribution).
    assert 2.8 < data["kurtosis"] < 3.1


def test_synth_unwritable_output_leaves_nothing(tmp_path: Path) -> None:
    out = tmp_path / "missing-folder" / "drive.wav"
    proc = run_cli("synth", str(EXAMPLES / "handlebar-nav-unit.yaml"), "--duration", "5",
                   "-o", str(out))
    assert_one_line_error(proc, "--output", "missing-folder")
    assert not (tmp_path / "missing-folder").exists()


def test_synth_clip_below_iec_floor(tmp_path: Path) -> None:
    proc = run_cli("synth", str(EXAMPLES / "handlebar-nav-unit.yaml"), "--duration", "5",
                   "-o", str(tmp_path / "d.wav"), "--clip-sigma", "2")
    assert_one_line_error(proc, "clip_sigma", "2.5", "IEC 60068-2-64")
    assert list(tmp_path.iterdir()) == []


def test_synth_crest_limits_unreachable(tmp_path: Path) -> None:
    # With clipping at 4 sigma the crest factor cannot exceed 4: asking for >= 4.5 fails after
    # --max-tries realizations with one line and no file.
    proc = run_cli("synth", str(EXAMPLES / "handlebar-nav-unit.yaml"), "--duration", "5",
                   "-o", str(tmp_path / "d.wav"), "--crest-min", "4.5", "--max-tries", "2")
    assert_one_line_error(proc, "crest_min", "max_tries")
    assert list(tmp_path.iterdir()) == []


def _scaled_example(tmp_path: Path, db: float) -> Path:
    """The handlebar example with every breakpoint level times 10^(db/10)."""
    import re

    text = (EXAMPLES / "handlebar-nav-unit.yaml").read_text()
    text = re.sub(r"asd: ([0-9.]+)", lambda m: f"asd: {float(m[1]) * 10 ** (db / 10):.6g}",
                  text)
    p = tmp_path / f"up{db:g}.yaml"
    p.write_text(text)
    return p


def test_check_exit_status_gates_on_feasibility(tmp_path: Path) -> None:
    # Feasible as written (exit 0); 12 dB up the loudspeaker preset's card input and output are
    # over their 3-sigma budgets (tests/test_feasibility.py): exit 3, with what binds and what
    # would make it feasible, in the table and in --json alike.
    ok = run_cli("check", str(EXAMPLES / "handlebar-nav-unit.yaml"), "--rig", "sim")
    assert ok.returncode == 0, ok.stderr
    assert "binding limit" in ok.stdout and "the full target (0 dB)" in ok.stdout
    spec = _scaled_example(tmp_path, 12.0)
    bad = run_cli("check", str(spec), "--rig", "sim")
    assert bad.returncode == 3, bad.stderr
    text = " ".join(bad.stdout.replace("│", " ").split())  # the table's wrapped cells joined
    for words in ("binding limit card input", "headroom left", "below the target",
                  "lowest frequency held at full level", "to make it feasible",
                  "raise the amplifier gain"):
        assert words in text, words
    js = run_cli("check", str(spec), "--rig", "sim", "--json")
    assert js.returncode == 3
    rig = json.loads(js.stdout)["rig"]
    assert rig["feasible"] is False and rig["binding_limit"] == "card input"
    assert -12 < rig["reachable_level_db"] < 0 and rig["lowest_controllable_hz"] > 20
    assert any("amplifier gain" in a for a in rig["advice"])
    assert f"{-rig['reachable_level_db']:.1f} dB below the target" in bad.stdout
    # Without --rig there is no rig verdict and no gate.
    assert run_cli("check", str(spec)).returncode == 0
