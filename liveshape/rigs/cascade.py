"""The shaker model as one cascade of second-order sections per output, with its state in modal
coordinates.

Pure (numpy/scipy). :class:`MotorCascades` factors each output of a :class:`~liveshape.rigs.modal.
ModalSystem` (coil current, table displacement, acceleration at the control point, per amplifier
volt) into second-order sections: the poles are the modal eigenvalues, the zeros the bilinear
images of the continuous transfer function's zeros (:func:`liveshape.rigs.plantmodel.
electromechanical_tf`, with ``z = -1`` for each pole in excess), the gain fitted to the modal
response. A cascade runs through :func:`~liveshape.rigs.modal.sosfilt_inplace`, every section in
one pass over the samples, which is why the rig uses cascades rather than the modal recursions.

The state of a cascade is a linear function of the modal state ``zeta`` (the state before a
sample is read): with ``A, B`` the cascade's own state-space form (live states only) and
``A V = V diag(nu)``, the part of the state along ``V_k`` is ``g_k zeta_k`` with
``g_k = (V^-1 B)_k / beta_k``, since both follow the same first-order recursion driven by the same
input. :meth:`MotorCascades.from_modal` and :meth:`~MotorCascades.to_modal` convert both ways
(the latter by least squares over all outputs), so a model rebuilt with another coil resistance
or resonance frequency takes over the physical state without a jump.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from liveshape.errors import ConfigError
from liveshape.rigs.modal import ModalSystem, sos_response

#: Outputs of the shaker model, in the order of the state-space rows.
OUTPUTS = ("current_a_per_v", "displacement_m_per_v", "accel_m_s2_per_v")
# A cascade must reproduce the modal transfer function to this relative accuracy (the modal form
# is exact to rounding; a factorization that loses more than half the digits is refused).
_FIT_RTOL = 1e-8
# Where the fit is made and checked: 8 points from 1e-4 fs to 0.45 fs on the unit circle.
_FIT_Z = np.exp(2j * np.pi * np.geomspace(1e-4, 0.45, 8))
_FIT_Z.flags.writeable = False


def _pair_sections(zeros: np.ndarray, poles: np.ndarray, gain: float) -> np.ndarray:
    """Second-order sections ``(n, 6)`` with these zeros, poles (as many) and gain.

    Each complex pole pair, and each two real poles, make one biquad; a single real pole left
    over makes a first-order section (``b2 = a2 = 0``) with the real zero nearest to it, placed
    first. The biquads take the zeros nearest to their poles (a conjugate pair or two reals), the
    poles nearest the unit circle first, and come in order of rising pole radius (the sections of
    :func:`scipy.signal.zpk2sos` come in the same order).
    """
    cpx_p = sorted((p for p in poles if p.imag > 0), key=abs, reverse=True)
    real_p = sorted((p.real for p in poles if p.imag == 0), key=abs, reverse=True)
    cpx_z = [z for z in zeros if z.imag > 0]
    real_z = [z.real for z in zeros if z.imag == 0]
    groups: list[list[complex]] = [[p, np.conj(p)] for p in cpx_p]
    groups += [[real_p[i], real_p[i + 1]] for i in range(0, len(real_p) - 1, 2)]
    groups.sort(key=lambda g: max(abs(x) for x in g), reverse=True)
    single = real_p[-1] if len(real_p) % 2 else None
    rows = []
    if single is not None:
        j = int(np.argmin([abs(z - single) for z in real_z]))
        z1 = real_z.pop(j)
        rows.append([1.0, -z1, 0.0, 1.0, -single, 0.0])
    for g in groups:
        p0 = g[0]
        best = (np.inf, None)
        for j, z in enumerate(cpx_z):
            best = min(best, (abs(z - p0), ("c", j)), key=lambda t: t[0])
        if len(real_z) >= 2:
            order = np.argsort([abs(z - p0) for z in real_z])
            d = abs(real_z[order[1]] - p0)
            best = min(best, (d, ("r", (int(order[0]), int(order[1])))), key=lambda t: t[0])
        kind, which = best[1]
        if kind == "c":
            z = cpx_z.pop(which)
            zz = [z, np.conj(z)]
        else:
            zz = [real_z[which[0]], real_z[which[1]]]
            for j in sorted(which, reverse=True):
                real_z.pop(j)
        rows.append([1.0, -(zz[0] + zz[1]).real, (zz[0] * zz[1]).real,
                     1.0, -(g[0] + g[1]).real, (g[0] * g[1]).real])
    # Biquads in order of rising pole radius after the first-order section.
    head, tail = (rows[:1], rows[1:]) if single is not None else ([], rows)
    sos = np.array(head + tail[::-1], dtype=float)
    sos[0, :3] *= gain
    return np.ascontiguousarray(sos)


def output_roots(tfs: dict[str, Any], n_modes: int, fs: float
                 ) -> list[tuple[np.ndarray, np.ndarray | None] | None]:
    """Per output of :data:`OUTPUTS`, the discrete zeros and (where needed) poles of its sections.

    The zeros are the bilinear images of the continuous zeros, then ``z = -1`` for each pole in
    excess; the poles are given (as bilinear images of the denominator's roots, to pick the modes
    that take part) only where the output has fewer poles than the model has modes. None where
    the output is not modelled. The zeros do not depend on the coil resistance (only the common
    denominator does), so one result serves every rebuild at the same modal frequencies.
    """
    h = 1.0 / fs
    out: list[tuple[np.ndarray, np.ndarray | None] | None] = []
    for key in OUTPUTS:
        poly = tfs.get(key)
        if poly is None:
            out.append(None)
            continue
        num = np.trim_zeros(np.asarray(poly[0], dtype=float), "f")
        den = np.trim_zeros(np.asarray(poly[1], dtype=float), "f")
        s_zeros = np.roots(num) if num.size > 1 else np.zeros(0)
        zeros = (1.0 + 0.5 * h * s_zeros) / (1.0 - 0.5 * h * s_zeros)
        zeros = np.concatenate((zeros, -np.ones(den.size - 1 - zeros.size)))
        poles = None
        if den.size - 1 != n_modes:
            s_poles = np.roots(den) if den.size > 1 else np.zeros(0)
            poles = (1.0 + 0.5 * h * s_poles) / (1.0 - 0.5 * h * s_poles)
        out.append((zeros, poles))
    return out


def _cascade_ss(sos: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray, float, list[int]]:
    """State-space ``(A, B, C, D)`` of a direct-form-II-transposed cascade on its live states,
    and the live indices.

    The state is ``zi.ravel()`` (``z0, z1`` per section); ``z1`` of a first-order section
    (``b2 = a2 = 0``) is always zero and left out.
    """
    nsec = sos.shape[0]
    live = [i for i in range(2 * nsec)
            if i % 2 == 0 or sos[i // 2, 2] != 0.0 or sos[i // 2, 5] != 0.0]

    # One step of the recursion from each live unit state (zero input) and from rest with a
    # unit input, all at once: the columns of [A B] and [C D].
    n = len(live)
    s = np.zeros((nsec, 2, n + 1))
    for j, idx in enumerate(live):
        s[idx // 2, idx % 2, j] = 1.0
    x = np.zeros(n + 1)
    x[n] = 1.0
    nxt = np.empty_like(s)
    for i, (b0, b1, b2, _, a1, a2) in enumerate(sos):
        y = b0 * x + s[i, 0]
        nxt[i, 0] = b1 * x - a1 * y + s[i, 1]
        nxt[i, 1] = b2 * x - a2 * y
        x = y
    ab = nxt.reshape(2 * nsec, n + 1)[live]
    return ab[:, :n], ab[:, n], x[:n], float(x[n]), live


class MotorCascades:
    """Per-output cascades of a shaker model and the map between their states and ``zeta``.

    Parameters
    ----------
    modal : ModalSystem
        The discretized shaker model (outputs in the order of :data:`OUTPUTS`).
    roots : list
        :func:`output_roots` of its continuous transfer functions
        (:func:`~liveshape.rigs.plantmodel.electromechanical_tf` at the same modal frequencies).

    Attributes
    ----------
    sos : list
        Per output a ``(n, 6)`` array of sections, or None where the output is identically
        zero (current and displacement of the ideal shaker).
    """

    def __init__(self, modal: ModalSystem,
                 roots: list[tuple[np.ndarray, np.ndarray | None] | None]) -> None:
        self.modal = modal
        self.sos: list[np.ndarray | None] = []
        self._maps: list[tuple[list[int], np.ndarray] | None] = []  # live indices, M
        self._ref = modal.response(_FIT_Z)
        for r, rts in enumerate(roots):
            if rts is None or (modal.d[r] == 0.0 and not np.any(modal.gamma[r])):
                self.sos.append(None)
                self._maps.append(None)
                continue
            sos, modes = self._factor(r, *rts)
            self.sos.append(sos)
            self._maps.append(self._state_map(sos, modes))

    def _factor(self, r: int, zeros: np.ndarray, poles_est: np.ndarray | None
                ) -> tuple[np.ndarray, list[int]]:
        m = self.modal
        modes: list[int] = list(range(m.n))
        if poles_est is not None:  # the modes nearest to the output's own poles
            modes = []
            for sp in poles_est:
                free = [k for k in range(m.n) if k not in modes]
                modes.append(min(free, key=lambda k: abs(m.lam[k] - sp)))
        poles = m.lam[modes]
        if poles.size == 0:
            return np.array([[m.d[r], 0.0, 0.0, 1.0, 0.0, 0.0]]), modes
        sos = _pair_sections(zeros, poles, 1.0)
        # Gain fitted to the modal response over the band (least squares, real).
        ref, unit = self._ref[r], sos_response(sos, _FIT_Z)
        gain = float(np.real(np.vdot(unit, ref)) / np.real(np.vdot(unit, unit)))
        sos[0, :3] *= gain
        err = np.max(np.abs(gain * unit - ref) / np.maximum(np.abs(ref), 1e-300))
        if not err <= _FIT_RTOL:
            raise ConfigError(
                f"plant: the shaker model's {OUTPUTS[r]} cannot be factored into sections "
                f"accurately (relative error {err:.1e}); check for cancelling modes")
        return sos, modes

    def _state_map(self, sos: np.ndarray, modes: list[int]) -> tuple[list[int], np.ndarray]:
        """Live state indices and the complex ``(live, n_modes)`` matrix ``M``: live cascade
        state = ``Re(M zeta)``."""
        m = self.modal
        a, b, _, _, live = _cascade_ss(sos)
        out = np.zeros((len(live), m.n), complex)
        if not live:
            return live, out
        nu, v = np.linalg.eig(a)
        coef = np.linalg.solve(v, b.astype(complex))
        for k in modes:
            j = int(np.argmin(np.abs(nu - m.lam[k])))
            out[:, k] = v[:, j] * (coef[j] / m.beta[k])
        return live, out

    def zero_state(self) -> list[np.ndarray | None]:
        """Cascade states ``(1, n_sections, 2)`` at rest (None for a zero output)."""
        return [None if s is None else np.zeros((1, s.shape[0], 2)) for s in self.sos]

    def from_modal(self, zeta: np.ndarray) -> list[np.ndarray | None]:
        """Cascade states holding the modal state ``zeta``."""
        states = self.zero_state()
        for st, mp in zip(states, self._maps, strict=True):
            if st is not None and mp is not None:
                flat = st.reshape(-1)
                flat[mp[0]] = np.real(mp[1] @ zeta)
        return states

    def to_modal(self, states: list[np.ndarray | None]) -> np.ndarray:
        """Modal state ``zeta`` of cascade states (least squares over every output)."""
        rows, rhs = [], []
        for st, mp in zip(states, self._maps, strict=True):
            if st is None or mp is None or not mp[1].shape[0]:
                continue
            scale = 1.0 / max(float(np.linalg.norm(mp[1])), 1e-300)
            rows.append(mp[1] * scale)
            rhs.append(st.reshape(-1)[mp[0]] * scale)
        if not rows or not self.modal.n:
            return np.zeros(self.modal.n, complex)
        sol = np.linalg.lstsq(np.vstack(rows), np.concatenate(rhs).astype(complex), rcond=None)
        return sol[0]

