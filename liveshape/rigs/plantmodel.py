"""Continuous-time models of a :class:`~liveshape.rigs.plant.Plant`: transfer functions and
state space.

Pure (numpy). Everything here is a function of a plant description; nothing is simulated (the
discrete engine is :mod:`liveshape.rigs.modal`, the block processor :mod:`liveshape.rigs.sim`).
Polynomials are ``(numerator, denominator)`` arrays in descending powers of ``s``.

Equations (SI units; ``x`` table displacement, ``y_j`` modal-mass displacements)::

    V      = (Re + s Le) I + Bl s X                                   (voice coil)
    Bl I   = (M s² + Rms s + 1/Cms) X + sum_j N_j (X - Y_j),  M = Mms + payload mass
    D_j Y_j = N_j X,  N_j = c_j s + k_j,  D_j = m_j s² + N_j,  k_j = m_j (2 pi f_j)²,
                      c_j = m_j 2 pi f_j / Q_j                         (modal masses)

which give, with ``Pi = prod_j D_j`` and ``P = (M s² + Rms s + 1/Cms) Pi
+ sum_j m_j s² N_j prod_{l != j} D_l``, ``Q = (Re + s Le) P + Bl² s Pi``:
``I/V = P/Q``, ``X/V = Bl Pi/Q``, ``Y_j/V = Bl N_j prod_{l != j} D_l / Q``; accelerations are
``s²`` times displacements. This is the standard lumped electro-mechanical analogue of a moving-coil
driver (R. H. Small, "Direct-radiator loudspeaker system analysis", JAES 20, 1972) with tuned
mass-spring-damper attachments (Den Hartog, "Mechanical Vibrations").

The ``ideal`` shaker model is an acceleration source: the table acceleration is ``g_per_v`` g per
amplifier volt at every frequency, whatever the payload; modal masses still respond to it as
base-excited single-degree-of-freedom systems.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np

from liveshape.dsp.profile import G0_M_S2

if TYPE_CHECKING:  # the plant module re-exports this one, so it is not imported at run time
    from liveshape.rigs.plant import Plant, Resonance

Poly = tuple[np.ndarray, np.ndarray]  # (numerator, denominator) in descending powers of s


def mode_constants(r: Resonance, f_factor: float = 1.0) -> tuple[float, float, float]:
    """``(m, c, k)`` of a modal mass: ``k = m w²``, ``c = m w / Q``, ``w = 2 pi f f_factor``."""
    w = 2.0 * math.pi * r.f_hz * f_factor
    return r.mass_kg, r.mass_kg * w / r.q, r.mass_kg * w * w


def highpass_tf(f_hz: float | None, order: int = 1) -> Poly:
    """Analog high-pass: ``s/(s + w)`` (order 1) or Butterworth ``s²/(s² + √2 w s + w²)``."""
    if f_hz is None:
        return np.array([1.0]), np.array([1.0])
    w = 2.0 * math.pi * f_hz
    if order == 1:
        return np.array([1.0, 0.0]), np.array([1.0, w])
    return np.array([1.0, 0.0, 0.0]), np.array([1.0, math.sqrt(2.0) * w, w * w])


def _mul(*polys: Poly) -> Poly:
    b, a = np.array([1.0]), np.array([1.0])
    for pb, pa in polys:
        b, a = np.polymul(b, pb), np.polymul(a, pa)
    return b, a


def electromechanical_tf(
    plant: Plant, *, re_ohm: float | None = None, f_factor: float = 1.0
) -> dict[str, Poly | None]:
    """Transfer functions per amplifier volt, as polynomials in ``s`` (see the module doc).

    Returns a dict with ``current_a_per_v`` (None for the ideal shaker), ``displacement_m_per_v``
    (table), ``table_accel_m_s2_per_v``, ``accel_m_s2_per_v`` (at the control point) and
    ``mode_accel_m_s2_per_v`` (a tuple: the acceleration of each modal mass, the points a monitor
    accelerometer on the test item would read).
    ``re_ohm`` overrides the coil resistance (heating); ``f_factor`` scales every modal frequency.
    """
    modes = [mode_constants(r, f_factor) for r in plant.payload.resonances]
    n_j = [np.array([c, k]) for _, c, k in modes]
    d_j = [np.array([m, c, k]) for m, c, k in modes]
    pi = np.array([1.0])
    for d in d_j:
        pi = np.polymul(pi, d)

    def others(j: int) -> np.ndarray:
        out = np.array([1.0])
        for l, d in enumerate(d_j):
            if l != j:
                out = np.polymul(out, d)
        return out

    s2 = np.array([1.0, 0.0, 0.0])
    ctrl = plant.payload.control_index()
    sh = plant.shaker
    if sh.model == "ideal":
        g = sh.g_per_v * G0_M_S2
        table = (np.array([g]), np.array([1.0]))
        accel = table if ctrl is None else (g * n_j[ctrl], d_j[ctrl])
        return {
            "current_a_per_v": None,
            "displacement_m_per_v": (np.array([g]), s2),
            "table_accel_m_s2_per_v": table,
            "accel_m_s2_per_v": accel,
            "mode_accel_m_s2_per_v": tuple((g * n, d) for n, d in zip(n_j, d_j, strict=True)),
        }
    re = sh.re_ohm if re_ohm is None else re_ohm
    mech = np.array([plant.moving_mass_kg, sh.rms_kg_s, 1.0 / sh.cms_m_per_n])
    p = np.polymul(mech, pi)
    for j, (m, _, _) in enumerate(modes):
        p = np.polyadd(p, np.polymul(m * s2, np.polymul(n_j[j], others(j))))
    q = np.polyadd(np.polymul([sh.le_h, re], p), sh.bl_tm**2 * np.polymul([1.0, 0.0], pi))
    q = np.trim_zeros(q, "f")
    x_num = sh.bl_tm * pi
    if ctrl is None:
        a_num = np.polymul(s2, x_num)
    else:
        a_num = np.polymul(s2, sh.bl_tm * np.polymul(n_j[ctrl], others(ctrl)))
    modes_accel = tuple((np.polymul(s2, sh.bl_tm * np.polymul(n_j[j], others(j))), q)
                        for j in range(len(modes)))
    return {
        "current_a_per_v": (p, q),
        "displacement_m_per_v": (x_num, q),
        "table_accel_m_s2_per_v": (np.polymul(s2, x_num), q),
        "accel_m_s2_per_v": (a_num, q),
        "mode_accel_m_s2_per_v": modes_accel,
    }


def mode_transmissibility_tf(plant: Plant, index: int, *, f_factor: float = 1.0) -> Poly:
    """Table acceleration -> acceleration of modal mass ``index``: ``(c s + k)/(m s² + c s + k)``.

    The base-excitation transmissibility of a single-degree-of-freedom system; its magnitude is
    ``sqrt((1 + (2ζr)²)/((1 - r²)² + (2ζr)²))`` with ``r = f/f_n`` and ``ζ = 1/(2Q)`` (e.g. S. S.
    Rao, *Mechanical Vibrations*, 5th ed., §3.6). It does not depend on the shaker: the modal
    mass only sees the table's motion.
    """
    res = plant.payload.resonances
    if not 0 <= index < len(res):
        raise IndexError(f"mode index {index} is outside 0-{len(res) - 1}")
    m, c, k = mode_constants(res[index], f_factor)
    return np.array([c, k]), np.array([m, c, k])


def fixture_point_tf(plant: Plant, index: int, *, f_factor: float = 1.0) -> Poly:
    """Table acceleration -> acceleration of fixture point ``index`` (a rocking fixture).

    ``((1 - μ) s² + 2ζω s + ω²)/(s² + 2ζω s + ω²)`` with ``ω = 2π f_hz f_factor``,
    ``ζ = 1/(2 q)`` and ``μ`` the point's ``coupling``. From the rocking equation of a rigid
    fixture about a pivot on the table, ``J θ'' + c θ' + k θ = -m e a_table`` (the table's
    inertial force on the off-centre mass), and the point's acceleration ``a_table + L θ''``;
    ``μ = m e L / J`` (docs/methods.md, "Several inputs"). Unity at 0 Hz, ``1 - μ`` far above
    the mode; ``μ = 1`` is the base-excitation transmissibility of :func:`mode_transmissibility_tf`.
    """
    pts = plant.payload.fixture_points
    if not 0 <= index < len(pts):
        raise IndexError(f"fixture point index {index} is outside 0-{len(pts) - 1}")
    p = pts[index]
    w = 2.0 * math.pi * p.f_hz * f_factor
    c = w / p.q  # 2ζω with ζ = 1/(2q)
    return np.array([1.0 - p.coupling, c, w * w]), np.array([1.0, c, w * w])


def drive_to_volts_tf(plant: Plant) -> Poly:
    """Card output FS -> amplifier output volts: scale, card AC coupling, subsonic filter."""
    k = plant.card.out_v_per_fs * plant.amplifier.gain_v_per_v
    amp = plant.amplifier
    return _mul(
        (np.array([k]), np.array([1.0])),
        highpass_tf(plant.card.out_highpass_hz, 1),
        highpass_tf(amp.highpass_hz, amp.highpass_order),
    )


def sensor_tf(plant: Plant) -> Poly:
    """Acceleration in m/s² at the control point -> card input FS (sensor and card high-passes)."""
    k = plant.accelerometer.sens_mv_per_g * 1e-3 / (G0_M_S2 * plant.card.in_v_per_fs)
    return _mul(
        (np.array([k]), np.array([1.0])),
        highpass_tf(plant.accelerometer.highpass_hz, 1),
        highpass_tf(plant.card.in_highpass_hz, 1),
    )


def chain_tf(plant: Plant) -> Poly:
    """Drive FS -> response FS, the rational part (the loop delay is not included)."""
    return _mul(drive_to_volts_tf(plant), electromechanical_tf(plant)["accel_m_s2_per_v"],
                sensor_tf(plant))


def evaluate_tf(poly: Poly, s: Any) -> np.ndarray:
    """``b(s)/a(s)`` of ``poly = (b, a)`` at the complex points ``s`` (rad/s); a pole gives inf."""
    b, a = poly
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.polyval(b, s) / np.polyval(a, s)


def voltage_frf(plant: Plant, f_hz: Any, output: str) -> np.ndarray:
    """Complex FRF per amplifier volt of ``output`` (a key of :func:`electromechanical_tf`)."""
    poly = electromechanical_tf(plant)[output]
    if poly is None:
        raise ValueError(f"{output} is not modelled for the {plant.shaker.model} shaker")
    return evaluate_tf(poly, 2j * math.pi * np.asarray(f_hz, dtype=float))


def analytic_frf(plant: Plant, f_hz: Any, *, fs_hz: float = 48000.0) -> np.ndarray:
    """Continuous-time FRF from drive FS to response FS, loop delay included.

    ``H(f) = H_drive->V(s) H_V->accel(s) H_accel->FS(s) exp(-s D/fs)`` at ``s = j 2 pi f``, each
    factor evaluated from its polynomials; ``D`` is ``card.delay_samples`` and ``fs_hz`` the
    sample rate that turns it into seconds.
    """
    f = np.asarray(f_hz, dtype=float)
    s = 2j * math.pi * f
    h = (evaluate_tf(drive_to_volts_tf(plant), s)
         * evaluate_tf(electromechanical_tf(plant)["accel_m_s2_per_v"], s)
         * evaluate_tf(sensor_tf(plant), s))
    return h * np.exp(-s * plant.card.delay_samples / float(fs_hz))


def electromechanical_ss(
    plant: Plant, *, re_ohm: float | None = None, f_factor: float = 1.0
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """State-space ``(A, B, C, D)`` from amplifier volts to ``[current A, table displacement m,
    control-point acceleration m/s²]``.

    Physical states: ``[i, x, v, y_1, w_1, ...]`` (coil current, table displacement and velocity,
    modal displacements and velocities); without inductance the current is algebraic and the
    state has no ``i``. The ideal shaker has states ``[z_j, dz_j/dt]`` (modal displacement
    relative to the table) and zero current/displacement rows; with no states at all the matrices
    have zero size and only ``D`` remains.
    """
    modes = [mode_constants(r, f_factor) for r in plant.payload.resonances]
    nm = len(modes)
    ctrl = plant.payload.control_index()
    sh = plant.shaker
    if sh.model == "ideal":
        g = sh.g_per_v * G0_M_S2
        n = 2 * nm
        a, b = np.zeros((n, n)), np.zeros((n, 1))
        for j, (m, c, k) in enumerate(modes):
            a[2 * j, 2 * j + 1] = 1.0
            a[2 * j + 1, 2 * j] = -k / m
            a[2 * j + 1, 2 * j + 1] = -c / m
            b[2 * j + 1, 0] = -g
        cc, dd = np.zeros((3, n)), np.zeros((3, 1))
        if ctrl is None:
            dd[2, 0] = g
        else:  # absolute acceleration of the mode = table + relative = -(c z' + k z)/m
            cc[2] = a[2 * ctrl + 1]
            dd[2, 0] = 0.0
        return a, b, cc, dd
    re = sh.re_ohm if re_ohm is None else re_ohm
    has_i = sh.le_h > 0.0
    o = 1 if has_i else 0  # offset of x
    n = o + 2 + 2 * nm
    a, b = np.zeros((n, n)), np.zeros((n, 1))
    ix, iv = o, o + 1
    mt = plant.moving_mass_kg
    a[ix, iv] = 1.0
    a[iv, ix] = -1.0 / (sh.cms_m_per_n * mt)
    a[iv, iv] = -sh.rms_kg_s / mt
    cc, dd = np.zeros((3, n)), np.zeros((3, 1))
    if has_i:
        a[0, 0] = -re / sh.le_h
        a[0, iv] = -sh.bl_tm / sh.le_h
        b[0, 0] = 1.0 / sh.le_h
        a[iv, 0] = sh.bl_tm / mt
        cc[0, 0] = 1.0
    else:  # i = (V - Bl v)/Re
        a[iv, iv] -= sh.bl_tm**2 / (re * mt)
        b[iv, 0] = sh.bl_tm / (re * mt)
        cc[0, iv] = -sh.bl_tm / re
        dd[0, 0] = 1.0 / re
    for j, (m, c, k) in enumerate(modes):
        iy, iw = o + 2 + 2 * j, o + 3 + 2 * j
        a[iy, iw] = 1.0
        a[iw, iy], a[iw, iw], a[iw, ix], a[iw, iv] = -k / m, -c / m, k / m, c / m
        a[iv, ix] -= k / mt
        a[iv, iv] -= c / mt
        a[iv, iy] += k / mt
        a[iv, iw] += c / mt
    cc[1, ix] = 1.0
    row = iv if ctrl is None else o + 3 + 2 * ctrl
    cc[2] = a[row]
    dd[2, 0] = b[row, 0]
    return a, b, cc, dd
