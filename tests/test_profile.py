"""Tests of liveshape.dsp.profile: integrals, interpolation, breakpoints, CSV files.

Tolerance bands are tested in test_tolerance.py, Miles' equation and the SDOF response in
test_response.py.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from refprofiles import N_3DB, W, navmat, quad_segments  # noqa: E402, F401
from scipy import integrate

from liveshape.dsp.profile import G0_M_S2, Profile
from liveshape.errors import ConfigError
from liveshape.testdef.profilefile import profile_from_points, read_profile_csv


# -- published and closed-form check values --------------------------------------------------
def test_navmat_p9492_overall_grms_and_displacement():
    p = navmat()
    # NAVMAT P-9492 publishes "6.0 grms" (rounded to 0.1); the exact integral is 6.06 (DOMAIN.md
    # §1, calc) — compare to the published rounding and to the calculated 3-figure value.
    assert abs(p.grms - 6.0) < 0.1  # NAVMAT P-9492 "6.0 grms", two significant figures
    assert abs(p.grms - 6.06) < 0.005  # calc (DOMAIN.md §1), 3 significant figures
    # End points ~0.01 and ~0.007 g²/Hz (NAVMAT P-9492 as tabulated, 1-2 significant figures).
    assert abs(p.asd_g2_hz[0] - 0.01) < 0.0005
    assert abs(p.asd_g2_hz[-1] - 0.007) < 0.0005
    # x_rms 0.194 mm (DOMAIN.md §1, calc); the figure there is cut, not rounded, at the third
    # decimal (exact 0.19462), so the check allows the one truncated digit.
    assert 0.194 <= p.displacement_rms_m * 1e3 < 0.195
    assert p.displacement_pp_3sigma_m == pytest.approx(6 * p.displacement_rms_m, rel=1e-15)


def test_navmat_slopes_are_plus_minus_3_db_oct():
    # NAVMAT P-9492 slopes +3 / 0 / -3 dB/oct; 3.0103 is a rounding of 10 log10 2 (calc), so the
    # resolved slope differs from 3 by at most 3*(3.0103/3.01029996 - 1) ~ 4e-8.
    s = navmat().slopes_db_oct
    assert s == pytest.approx((3.0, 0.0, -3.0), abs=1e-6)


def test_flat_band_20_2000_is_8p899_grms():
    # Flat 0.04 g²/Hz 20-2000 Hz: sqrt(0.04 * 1980) = sqrt(79.2) = 8.899 grms (calc, DOMAIN.md §1).
    p = Profile((20.0, 2000.0), (0.04, 0.04))
    assert p.grms == pytest.approx(math.sqrt(79.2), rel=1e-12)
    assert abs(p.grms - 8.899) < 0.0005


# -- segment integrals against scipy quad ----------------------------------------------------
@pytest.mark.parametrize(
    "f_hz, asd",
    [
        ((20.0, 2000.0), (0.04, 0.0004)),  # n = -1 exactly (log form)
        ((350.0, 2000.0), (0.04, 0.04 * (350 / 2000) ** N_3DB)),  # -3 dB/oct, n = -0.9966
        ((20.0, 80.0, 350.0), (0.01, 0.04, 0.04)),
        ((10.0, 30.0, 31.0, 500.0), (0.001, 0.001, 0.2, 0.02)),  # steep step
    ],
)
def test_segment_areas_match_scipy_quad(f_hz, asd):
    p = Profile(f_hz, asd)
    ref = [
        integrate.quad(p.asd_at, a, b, epsrel=1e-12, epsabs=0)[0]
        for a, b in zip(f_hz[:-1], f_hz[1:], strict=True)
    ]
    # scipy.integrate.quad as reference; quad's estimate is good to ~1e-12 on a smooth power law.
    np.testing.assert_allclose(p.segment_areas_g2(), ref, rtol=1e-9)


def test_minus_one_exponent_uses_log_form_and_near_minus_one_agrees():
    # n = -1: A = a1 f1 ln(f2/f1) (calc, DOMAIN.md §1).
    p = Profile((20.0, 2000.0), (0.04, 0.0004))
    assert p.exponents[0] == pytest.approx(-1.0, abs=1e-14)
    assert p.segment_areas_g2()[0] == pytest.approx(0.04 * 20 * math.log(100), rel=1e-12)
    # Just outside the switch (|n+1| = 1e-5): general form, continuous with the log form to
    # first order: relative change ~ (n+1) ln(r)/2 = 2.3e-5 (Taylor expansion, calc).
    q = Profile((20.0, 2000.0), (0.04, 0.04 * 100 ** (-1 + 1e-5)))
    ref = integrate.quad(q.asd_at, 20, 2000, epsrel=1e-13, epsabs=0)[0]
    assert q.segment_areas_g2()[0] == pytest.approx(ref, rel=1e-9)  # scipy quad as reference


def test_velocity_and_displacement_match_scipy_quad():
    p = navmat()
    w = lambda f: 2 * math.pi * f  # noqa: E731
    v_ms = quad_segments(lambda f: p.asd_at(f) * G0_M_S2**2 / w(f) ** 2, p.f_hz)
    x_ms = quad_segments(lambda f: p.asd_at(f) * G0_M_S2**2 / w(f) ** 4, p.f_hz)
    # scipy.integrate.quad as reference (velocity PSD = ASD g0²/(2 pi f)², DOMAIN.md §1).
    assert p.velocity_rms_m_s == pytest.approx(math.sqrt(v_ms), rel=1e-9)
    assert p.displacement_rms_m == pytest.approx(math.sqrt(x_ms), rel=1e-9)


def test_displacement_of_flat_band_closed_form():
    # Flat a: x_ms = a g0²/(2 pi)^4 (f1^-3 - f2^-3)/3 (integral of f^-4, calc).
    a, f1, f2 = 0.01, 20.0, 500.0
    p = Profile((f1, f2), (a, a))
    x_ms = a * G0_M_S2**2 / (2 * math.pi) ** 4 * (f1**-3 - f2**-3) / 3
    assert p.displacement_rms_m == pytest.approx(math.sqrt(x_ms), rel=1e-12)


@pytest.mark.parametrize(
    "lo, hi", [(20, 2000), (50, 100), (79, 81), (300, 1200), (1, 30), (10, 5000)]
)
def test_band_ms_matches_scipy_quad(lo, hi):
    p = navmat()
    pts = [f for f in p.f_hz if max(lo, 20) < f < min(hi, 2000)]
    edges = [max(lo, 20.0), *pts, min(hi, 2000.0)]
    ref = quad_segments(p.asd_at, edges)  # scipy.integrate.quad as reference
    assert p.band_ms_g2(lo, hi) == pytest.approx(ref, rel=1e-9)


def test_band_outside_is_zero_and_whole_band_is_grms_squared():
    p = navmat()
    assert p.band_ms_g2(2000, 3000) == 0.0
    assert p.band_ms_g2(5, 20) == 0.0
    assert p.band_ms_g2(0.1, 1e5) == pytest.approx(p.grms**2, rel=1e-13)


# -- interpolation ---------------------------------------------------------------------------
def test_asd_at_loglog_midpoint_and_outside():
    p = Profile((20.0, 80.0), (0.01, 0.04))
    # Log-log straight line: at the geometric mean the level is the geometric mean (calc).
    assert p.asd_at(40.0) == pytest.approx(0.02, rel=1e-12)
    assert p.asd_at(19.999) == 0.0 and p.asd_at(80.001) == 0.0
    assert p.asd_at(20.0) == 0.01 and p.asd_at(80.0) == 0.04
    out = p.asd_at(np.array([[10.0, 20.0], [40.0, 100.0]]))
    assert out.shape == (2, 2)


@pytest.mark.parametrize("gap_hz", [1.0, 1e-3])
def test_near_vertical_step_is_bounded_and_exact(gap_hz):
    # Published transport profiles have steps 1 Hz apart and slopes > 500 dB/oct (DOMAIN.md §1).
    p = Profile((10.0, 100.0, 100.0 + gap_hz, 1000.0), (1e-4, 1e-4, 0.1, 0.1))
    assert p.slopes_db_oct[1] > 500
    f = np.linspace(100.0, 100.0 + gap_hz, 1001)
    a = p.asd_at(f)
    assert np.all(np.isfinite(a)) and np.all(np.diff(a) > 0)
    assert a.min() >= 1e-4 * (1 - 1e-12) and a.max() <= 0.1 * (1 + 1e-12)
    ref = integrate.quad(p.asd_at, 100.0, 100.0 + gap_hz, epsrel=1e-12, epsabs=0)[0]
    assert p.segment_areas_g2()[1] == pytest.approx(ref, rel=1e-8)  # scipy quad as reference
    assert np.isfinite(p.grms) and np.isfinite(p.displacement_rms_m)


def test_lines_are_on_the_fft_grid():
    p = navmat()
    a = p.lines(48000.0, 8192)
    assert a.shape == (4097,)
    k = np.arange(4097)
    np.testing.assert_array_equal(a, p.asd_at(k * 48000.0 / 8192))
    assert a[0] == 0.0 and a[-1] == 0.0  # DC and Nyquist are outside 20-2000 Hz


def test_scaled_is_ten_log():
    p = navmat()
    q = p.scaled(-6.0)
    # rms ratio of -6 dB in power is 10^(-6/20) (definition of the decibel).
    assert q.grms / p.grms == pytest.approx(10 ** (-6 / 20), rel=1e-12)
    assert q.f_hz == p.f_hz


# -- breakpoints, slopes, units --------------------------------------------------------------
@pytest.mark.parametrize("m", [6.0, -12.0, 3.0103, -0.5])
def test_slope_resolution(m):
    # a2 = a1 (f2/f1)^(m/3.0103) (DOMAIN.md §1, calc); 3.0103 vs 10 log10 2 differs by 1.4e-6
    # relative, which moves a2 by |n| ln(f2/f1) 1.4e-6 < 2e-5 over 3 octaves.
    p = profile_from_points([{"f_hz": 100, "asd": 0.02}, {"f_hz": 800, "slope_db_oct": m}], W)
    assert p.asd_g2_hz[1] == pytest.approx(0.02 * 8 ** (m / 3.0103), rel=2e-5)
    assert p.slopes_db_oct[0] == pytest.approx(m, rel=1e-12)


def test_chained_slopes_resolve_forward():
    p = profile_from_points(
        [
            {"f_hz": 20, "asd": 0.01},
            {"f_hz": 40, "slope_db_oct": 3},
            {"f_hz": 80, "slope_db_oct": 3},
            {"f_hz": 160, "asd": 0.04},
        ],
        W,
    )
    # Two octaves at +3 dB/oct from 0.01: 0.01 * 4^(3/3.0103) (calc); 3.0103 is 10 log10 2
    # rounded (relative 1.4e-8 off), which moves the level by 2 ln4 1.4e-8 < 1e-7 relative.
    assert p.asd_g2_hz[2] == pytest.approx(0.01 * 4**N_3DB, rel=1e-7)


def test_si_units_convert_by_g0_squared():
    pts = [{"f_hz": 20, "asd": 1.0}, {"f_hz": 200, "asd": 1.0}]
    p = profile_from_points(pts, W, units="(m/s2)2/Hz")
    # 1 (m/s²)²/Hz = 1/9.80665² g²/Hz (standard gravity, CGPM 1901).
    assert p.asd_g2_hz[0] == pytest.approx(1 / 9.80665**2, rel=1e-15)


@pytest.mark.parametrize("units", ["mm2/s4/Hz", "m/s2", "g", "grms", "kg2/Hz", "V2/Hz"])
def test_unknown_units_lists_valid_ones(units):
    with pytest.raises(ConfigError, match=r"g2/Hz.*\(m/s2\)2/Hz") as e:
        profile_from_points([{"f_hz": 20, "asd": 1}, {"f_hz": 30, "asd": 1}], W, units=units)
    assert units in str(e.value) and "\n" not in str(e.value)


# 1 (m/s²)²/Hz = 1/g0² g²/Hz with the standard acceleration of gravity g0 = 9.80665 m/s²
# (CGPM 1901; ISO 80000-3). Every usual spelling of either unit must give its factor.
@pytest.mark.parametrize("units, factor", [
    ("g2/Hz", 1.0), ("g^2/Hz", 1.0), ("g²/Hz", 1.0), ("G^2/HZ", 1.0),
    ("(m/s2)2/Hz", 1 / 9.80665**2), ("(m/s²)²/Hz", 1 / 9.80665**2),
    ("m²/s⁴/Hz", 1 / 9.80665**2), ("m^2/s^4/Hz", 1 / 9.80665**2), ("m2/s4/Hz", 1 / 9.80665**2),
])
def test_asd_unit_spellings(units, factor):
    p = profile_from_points([{"f_hz": 20, "asd": 1}, {"f_hz": 30, "asd": 1}], W, units=units)
    assert p.asd_g2_hz[0] == pytest.approx(factor, rel=1e-15)


@pytest.mark.parametrize("header, factor", [
    ("f_hz,asd_m2s4_hz", 1 / 9.80665**2), ("f_hz,asd m²/s⁴/Hz", 1 / 9.80665**2),
    ("frequency Hz, ASD (m/s²)²/Hz", 1 / 9.80665**2), ("f_hz,asd_g2_hz", 1.0),
    ("f [Hz], ASD [g^2/Hz]", 1.0), ("f_hz,asd", 1.0),
])
def test_csv_header_units(tmp_path, header, factor):
    path = tmp_path / "p.csv"
    path.write_text(f"{header}\n20,1\n30,1\n", encoding="utf-8")
    # A superscript header once read silently as g²/Hz: a 9.8² = 96x (19.8 dB) level error.
    assert read_profile_csv(path).asd_g2_hz[0] == pytest.approx(factor, rel=1e-15)


@pytest.mark.parametrize("header", ["f_hz,asd (mm/s2)2/Hz", "f_hz,asd V^2/Hz", "f,asd [m/s2]"])
def test_csv_header_unknown_unit_refused(tmp_path, header):
    path = tmp_path / "p.csv"
    path.write_text(f"{header}\n20,1\n30,1\n", encoding="utf-8")
    with pytest.raises(ConfigError, match=r"p\.csv: line 1: .*not a known ASD unit") as e:
        read_profile_csv(path)
    assert "\n" not in str(e.value)


@pytest.mark.parametrize(
    "points, match",
    [
        (
            [{"f_hz": 20, "asd": 0.01}, {"f_hz": 20, "asd": 0.02}],
            r"breakpoints\[1\]\.f_hz = 20 "
            r"is not above breakpoints\[0\]\.f_hz = 20 \(frequencies must increase\)",
        ),
        ([{"f_hz": 2000, "asd": 0.01}, {"f_hz": 1800, "asd": 0.02}], "frequencies must increase"),
        ([{"f_hz": 20, "asd": 0.0}, {"f_hz": 30, "asd": 0.02}], r"asd = 0.0 must be > 0"),
        ([{"f_hz": 20, "asd": -1}, {"f_hz": 30, "asd": 0.02}], r"asd = -1 must be > 0"),
        ([{"f_hz": -5, "asd": 1}, {"f_hz": 30, "asd": 0.02}], r"f_hz = -5 must be > 0"),
        ([{"f_hz": 20, "asd": 0.01}], "at least 2"),
        ([], "at least 2"),
        ([{"f_hz": 20, "slope_db_oct": 3}, {"f_hz": 80, "asd": 0.04}], "first point must give"),
        ([{"f_hz": 20, "asd": 1, "slope_db_oct": 3}, {"f_hz": 80, "asd": 1}], "exactly one"),
        ([{"f_hz": 20}, {"f_hz": 80, "asd": 1}], "exactly one"),
        ([{"f_hz": 20, "asd": 1}, {"f_hz": 80, "adz": 1}], "did you mean 'asd'"),
        ([{"f_hz": 20, "asd": "lots"}, {"f_hz": 80, "asd": 1}], "is not a number"),
        ([{"f_hz": 20, "asd": 1e-300}, {"f_hz": 2e5, "slope_db_oct": -400}], "finite number > 0"),
        ("not a list", "must be a list"),
    ],
)
def test_bad_breakpoints_are_one_config_error(points, match):
    with pytest.raises(ConfigError, match=match) as e:
        profile_from_points(points, W)
    assert "\n" not in str(e.value) and "test.yaml" in str(e.value)


def test_profile_constructor_validates():
    for f, a in [
        ((20,), (1,)),
        ((20, 20), (1, 1)),
        ((20, 30), (1, 0)),
        ((0, 30), (1, 1)),
        ((20, float("inf")), (1, 1)),
        ((20, 30), (1, float("nan"))),
        ((20, 30), (1,)),
    ]:
        with pytest.raises(ConfigError):
            Profile(f, a)


# -- CSV profiles ----------------------------------------------------------------------------
def write(tmp_path, name, text):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


@pytest.mark.parametrize(
    "text",
    [
        "# bench\nf_hz, asd_g2_hz\n20, 0.01\n80, 0.04  # knee\n\n350,0.04\n",
        "20 0.01\n80\t0.04\n350   0.04\n",
        "Hz;g2/Hz\n20;0,01\n80;0,04\n350;0,04\n",
        "\ufeff20,0.01\r\n80,0.04\r\n350,0.04\r\n",
    ],
)
def test_csv_separators_comments_header(tmp_path, text):
    p = read_profile_csv(write(tmp_path, "bench.csv", text))
    assert p.f_hz == (20.0, 80.0, 350.0)
    assert p.asd_g2_hz == (0.01, 0.04, 0.04)
    assert p.name == "bench"


@pytest.mark.parametrize("header", ["f_hz,asd_m2s4_hz", "Hz, (m/s2)2/Hz", "freq asd[m/s^2]^2/Hz"])
def test_csv_si_header_converts(tmp_path, header):
    p = read_profile_csv(write(tmp_path, "si.csv", f"{header}\n20, 1.0\n100, 2.0\n"))
    # 1 (m/s²)²/Hz = 1/g0² g²/Hz (standard gravity 9.80665 m/s², CGPM 1901).
    assert p.asd_g2_hz == pytest.approx((1 / 9.80665**2, 2 / 9.80665**2), rel=1e-15)


@pytest.mark.parametrize(
    "text, match",
    [
        (
            "f,asd\n20,0.01\n2000,0.02\n1800,0.03\n",
            r"bench\.csv: line 4: f_hz = 1800 is not above 2000 on line 3 \(frequencies must "
            r"increase\)",
        ),
        ("20,0.01\n20,0.02\n", r"line 2: f_hz = 20 is not above 20 on line 1"),
        ("20,0.01\n30,0\n", r"line 2: asd = 0 must be a finite number > 0"),
        ("20,0.01\n30,-0.1\n", r"line 2: asd = -0.1 must be"),
        ("20,0.01\n", r"at least 2 data lines"),
        ("", r"at least 2 data lines"),
        ("# only comments\nf,asd\n", r"at least 2 data lines"),
        ("20,0.01\n30,abc\n", r"line 2: asd = 'abc' is not a number"),
        ("20,0.01\n30,0.1,5\n", r"line 2: .* has 3 cells, expected 2"),
        ("20,0.01\nf,asd\n", r"line 2: f_hz = 'f' is not a number"),
        ("20,0.01\n30,nan\n", r"line 2: asd = nan must be a finite number"),
    ],
)
def test_csv_bad_input_is_one_config_error(tmp_path, monkeypatch, text, match):
    monkeypatch.chdir(tmp_path)
    write(tmp_path, "bench.csv", text)
    with pytest.raises(ConfigError, match=match) as e:
        read_profile_csv("bench.csv")
    assert "\n" not in str(e.value) and str(e.value).startswith("bench.csv")


def test_csv_missing_file(tmp_path):
    with pytest.raises(ConfigError, match="file not found"):
        read_profile_csv(tmp_path / "nope.csv")

