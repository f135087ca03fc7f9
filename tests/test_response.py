"""Tests of liveshape.dsp.response: Miles' equation and the exact SDOF response to a profile."""

from __future__ import annotations

import math

import pytest
from refprofiles import N_3DB, W, navmat, quad_segments  # noqa: E402, F401

from liveshape.dsp.profile import Profile
from liveshape.dsp.response import miles_grms, sdof_response_grms, sdof_transmissibility_sq
from liveshape.errors import ConfigError


def test_miles_check_value():
    # NASA GSFC FEMCI "Miles' Equation": fn 100 Hz, Q 10, 0.04 g²/Hz -> 7.93 grms (3 figures).
    assert abs(miles_grms(100, 10, 0.04) - 7.93) < 0.005
    assert miles_grms(100, 10, 0.04) == pytest.approx(math.sqrt(math.pi / 2 * 100 * 10 * 0.04))


@pytest.mark.parametrize("q", [5.0, 10.0, 50.0])
def test_sdof_exact_response_to_wide_white_band(q):
    fn, a, f1, f2 = 100.0, 0.04, 0.01, 1e6
    p = Profile((f1, f2), (a, a))
    # Exact absolute-acceleration response to white base input over 0..inf is
    # Miles * sqrt(1 + 1/Q²) [calc: integral of the transmissibility, docs/methods.md, "Response
    # of a single-degree-of-freedom item"]. The band
    # misses f < f1 (|T|² ~ 1: a f1) and f > f2 (|T|² ~ (fn/(Q f))²: a fn²/(Q² f2)).
    inf_ms = (miles_grms(fn, q, a) ** 2) * (1 + 1 / q**2)
    band_ms = inf_ms - a * f1 - a * fn**2 / (q**2 * f2)
    got = sdof_response_grms(p, fn, q)
    # Tail approximations are good to O(f1/fn)² and O(fn/f2)² relative to the tails themselves
    # (~1e-8 of the total); Simpson with 40 steps per half-power width is ~1e-8 (calc).
    assert got**2 == pytest.approx(band_ms, rel=1e-7)


def test_sdof_check_value_fn100_q10():
    # fn 100 Hz, Q 10, 0.04 g²/Hz: Miles (J. W. Miles, J. Aeronaut. Sci. 21(11), 1954) gives
    # sqrt(pi/2 * 100 * 10 * 0.04) = 7.93 grms, the exact integral 7.93 sqrt(1.01) = 7.97 [calc].
    p = Profile((0.01, 1e6), (0.04, 0.04))
    assert abs(sdof_response_grms(p, 100, 10) - 7.97) < 0.005


def test_sdof_matches_scipy_quad_on_navmat():
    p = navmat()
    fun = lambda f: p.asd_at(f) * sdof_transmissibility_sq(f, 150.0, 20.0)  # noqa: E731
    edges = sorted({*p.f_hz, 150.0})
    ref = quad_segments(fun, edges)  # scipy.integrate.quad as reference
    assert sdof_response_grms(p, 150.0, 20.0) == pytest.approx(math.sqrt(ref), rel=1e-7)


def test_sdof_bad_parameters():
    with pytest.raises(ConfigError):
        sdof_response_grms(navmat(), 0.0, 10)
    with pytest.raises(ConfigError):
        sdof_response_grms(navmat(), 100.0, float("nan"))
