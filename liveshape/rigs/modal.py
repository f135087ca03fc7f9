"""The discrete engine of the simulated rig: trapezoidal (bilinear) discretization of linear
models, run as real first- and second-order recursions with carried state.

Pure (numpy/scipy). :class:`ModalSystem` runs a continuous state-space model (the shaker with its
payload, from :func:`liveshape.rigs.plantmodel.electromechanical_ss`) diagonalized, so that its
physical state can be read out and handed to a model with other parameters without a jump.
:func:`highpass_sections` and :func:`run_sections` are the Butterworth high-pass cascades of the
card, amplifier and sensor.

Discretization: the trapezoidal rule (bilinear transform, no prewarp) at the rig's sample rate
(Oppenheim & Schafer, "Discrete-Time Signal Processing", bilinear transformation).
"""

from __future__ import annotations

import math
from collections.abc import Iterable

import numpy as np
from scipy import signal

from liveshape.errors import ConfigError

try:  # the compiled core of scipy.signal.lfilter, called without the wrapper's checks
    from scipy.signal._sigtools import _linear_filter
except ImportError:  # pragma: no cover - a scipy without it: the public function
    _linear_filter = None


def iir(b: np.ndarray, a: np.ndarray, x: np.ndarray, zi: np.ndarray
        ) -> tuple[np.ndarray, np.ndarray]:
    """``scipy.signal.lfilter(b, a, x, zi=zi)`` for float64 arrays with ``len(a) >= 2``.

    For such arguments :func:`~scipy.signal.lfilter` only checks them and calls its compiled
    direct form II transposed core; this calls the core directly (the wrapper costs about as
    much as filtering a thousand samples), so the results are the same to the bit. Where that
    core is not found, the public function is used.
    """
    if _linear_filter is None:  # pragma: no cover
        return signal.lfilter(b, a, x, zi=zi)
    return _linear_filter(b, a, x, -1, zi)


_ONE = np.ones(1)  # the numerator of the all-pole pair recursions (read-only)
_ONE.flags.writeable = False


class ModalSystem:
    """Trapezoidal discretization of ``(A, B, C, D)`` run in modal coordinates.

    With ``M1 = I - h A/2`` the discrete system is ``Ad = M1^-1 (I + h A/2)``, ``Bd = h M1^-1 B``,
    ``Cd = C M1^-1``, ``Dd = D + Cd h B/2`` (bilinear transform); its state relates to the
    physical one by ``x = M1^-1 (xd + h B u / 2)``. ``Ad`` shares the eigenvectors ``W`` of ``A``,
    with eigenvalues ``(1 + h mu/2)/(1 - h mu/2)``. A real mode ``zeta`` runs as a first-order real
    recursion. A complex pair ``(lambda, conj lambda)`` runs as one real all-pole recursion
    ``p = u/((1 - lambda z^-1)(1 - conj(lambda) z^-1))``, since its modal state is
    ``zeta[n] = beta (p[n-1] - conj(lambda) p[n-2])`` and contributes ``2 Re(gamma zeta)``.
    """

    def __init__(self, a: np.ndarray, b: np.ndarray, c: np.ndarray, d: np.ndarray, fs: float):
        n = a.shape[0]
        self.n, self.h = n, 1.0 / fs
        self.b = b[:, 0]
        self.m1 = np.eye(n) - 0.5 * self.h * a
        self.n_out = c.shape[0]
        if not n:
            self.lam = self.beta = np.zeros(0, complex)
            self.gamma = np.zeros((self.n_out, 0), complex)
            self.d = d[:, 0].astype(float)
            self.real_k, self.pair_k, self.real_ba, self.real_c = [], [], [], []
            self.pair_a, self.pair_c1, self.pair_c2 = [], [], []
            self._d_col, self._work = self.d[:, None], ()
            return
        cd = np.linalg.solve(self.m1.T, c.T).T
        bd = self.h * np.linalg.solve(self.m1, b)
        mu, w = np.linalg.eig(a)
        winv = np.linalg.inv(w)
        # Infinity-norm condition number of the eigenvectors (cheap; exact enough as a guard).
        if np.abs(w).sum(axis=1).max() * np.abs(winv).sum(axis=1).max() > 1e10:
            raise ConfigError(
                "plant: the shaker/payload model has (nearly) repeated modes; make the "
                "resonances differ in f_hz or q"
            )
        self.w, self.winv = w, winv
        self.lam = (1.0 + 0.5 * self.h * mu) / (1.0 - 0.5 * self.h * mu)
        self.beta = (self.winv @ bd)[:, 0]
        self.gamma = cd @ w
        self.d = (d + 0.5 * self.h * (cd @ b))[:, 0]
        self._d_col = self.d[:, None]
        self._work = (np.empty((self.n_out, 0)), np.empty((self.n_out, 0)), np.empty(2))
        self.real_k = [k for k in range(n) if mu[k].imag == 0.0]
        self.pair_k = [k for k in range(n) if mu[k].imag > 0.0]
        # Real modes: lfilter([0, beta], [1, -lam]); output gamma * zeta.
        self.real_ba = [(np.array([0.0, self.beta[k].real]), np.array([1.0, -self.lam[k].real]))
                        for k in self.real_k]
        self.real_c = [self.gamma[:, k].real[:, None] for k in self.real_k]
        # Pairs: lfilter([1], [1, -a1, -a2]); output c1 p[n-1] + c2 p[n-2].
        self.pair_a, self.pair_c1, self.pair_c2 = [], [], []
        for k in self.pair_k:
            lam, gb = self.lam[k], self.gamma[:, k] * self.beta[k]
            self.pair_a.append(np.array([1.0, -2.0 * lam.real, abs(lam) ** 2]))
            self.pair_c1.append((2.0 * gb.real)[:, None])
            self.pair_c2.append((-2.0 * (gb * np.conj(lam)).real)[:, None])

    def zero_state(self) -> tuple[list, list]:
        """State: per real mode ``[zeta]``; per pair ``(lfilter zi (2,), [p[n-2], p[n-1]])``."""
        return ([np.zeros(1) for _ in self.real_k],
                [(np.zeros(2), np.zeros(2)) for _ in self.pair_k])

    def run(self, u: np.ndarray, state: tuple[list, list], out: np.ndarray | None = None
            ) -> tuple[np.ndarray, tuple]:
        """Outputs ``(n_out, len(u))`` for one segment, and the state after it.

        ``out``, when given, is a C-contiguous float array of that shape to write into (it is
        returned). Each output sample is ``d u + sum_real c z + sum_pairs (c1 p1 + c2 p2)``,
        summed in that order.
        """
        n = u.size
        if out is None:
            out = np.empty((self.n_out, n))
        np.multiply(self._d_col, u, out=out)
        real_new, pair_new = [], []
        if not (self.real_k or self.pair_k):
            return out, (real_new, pair_new)
        tmp, tmp2, ext = self._scratch(n)
        for (bb, aa), c, zi in zip(self.real_ba, self.real_c, state[0], strict=True):
            z, zf = iir(bb, aa, u, zi)
            real_new.append(zf)
            out += np.multiply(c, z, out=tmp)
        for aa, c1, c2, (zi, last) in zip(self.pair_a, self.pair_c1, self.pair_c2, state[1],
                                          strict=True):
            p, zf = iir(_ONE, aa, u, zi)
            ext[:2] = last
            ext[2:] = p
            np.multiply(c1, ext[1:-1], out=tmp)
            tmp += np.multiply(c2, ext[:-2], out=tmp2)
            out += tmp
            pair_new.append((zf, ext[-2:].copy()))
        return out, (real_new, pair_new)

    def _scratch(self, n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Work arrays for :meth:`run`: two ``(n_out, n)`` and one ``(n + 2,)``, reused."""
        if self._work[0].shape[1] < n:
            cap = max(n, 2 * self._work[0].shape[1])
            self._work = (np.empty((self.n_out, cap)), np.empty((self.n_out, cap)),
                          np.empty(cap + 2))
        a, b, e = self._work
        return a[:, :n], b[:, :n], e[:n + 2]

    def _modal(self, state: tuple[list, list]) -> np.ndarray:
        """Complex modal coordinates ``zeta`` (all n modes) of a state."""
        zeta = np.zeros(self.n, complex)
        for k, zi in zip(self.real_k, state[0], strict=True):
            zeta[k] = zi[0]
        for k, (_, last) in zip(self.pair_k, state[1], strict=True):
            lam = self.lam[k]
            zeta[k] = self.beta[k] * (last[1] - np.conj(lam) * last[0])
        conj = [k for k in range(self.n) if k not in self.real_k and k not in self.pair_k]
        for k in conj:  # the partner of each pair (numpy orders a pair as k, k+1)
            zeta[k] = np.conj(zeta[k - 1])
        return zeta

    def to_physical(self, state: tuple[list, list], u0: float) -> np.ndarray:
        """Physical state at the sample whose input is ``u0``."""
        if not self.n:
            return np.zeros(0)
        xd = (self.w @ self._modal(state)).real
        return np.linalg.solve(self.m1, xd + 0.5 * self.h * self.b * u0)

    def from_physical(self, x: np.ndarray, u0: float) -> tuple[list, list]:
        """State of this model holding physical state ``x`` at the sample whose input is ``u0``."""
        if not self.n:
            return self.zero_state()
        zeta = self.winv @ (self.m1 @ x - 0.5 * self.h * self.b * u0)
        real = [np.array([zeta[k].real]) for k in self.real_k]
        pairs = []
        for k, aa in zip(self.pair_k, self.pair_a, strict=True):
            lam = self.lam[k]
            q = zeta[k] / self.beta[k] if self.beta[k] != 0 else 0j
            p2 = q.imag / lam.imag
            p1 = q.real + lam.real * p2
            zi = np.array([-aa[1] * p1 - aa[2] * p2, -aa[2] * p1])
            pairs.append((zi, np.array([p2, p1])))
        return real, pairs

    def response(self, z: np.ndarray) -> np.ndarray:
        """Discrete transfer functions ``(n_out, len(z))`` at the points ``z``."""
        h = np.repeat(self.d[:, None].astype(complex), z.size, axis=1)
        for k in range(self.n):
            h += self.gamma[:, k:k + 1] * (self.beta[k] / (z - self.lam[k]))[None, :]
        return h


def highpass_sections(corners: Iterable[tuple[float | None, int]], gain: float, fs: float):
    """Bilinear second-order sections ``[(b, a), ...]`` of Butterworth high-passes in cascade.

    None corners are skipped; no corners at all gives None (a plain gain). Each section runs
    through :func:`iir` (the direct form II transposed of :func:`scipy.signal.lfilter`), which
    costs less per call than ``sosfilt`` for these short cascades.
    """
    z_all: list[complex] = []
    p_all: list[complex] = []
    k_all = float(gain)
    for f_hz, order in corners:
        if f_hz is None:
            continue
        z, p, k = signal.butter(order, 2 * math.pi * f_hz, "highpass", analog=True, output="zpk")
        zd, pd, kd = signal.bilinear_zpk(z, p, k, fs)
        z_all.extend(zd)
        p_all.extend(pd)
        k_all *= float(np.real(kd))
    if not p_all:
        return None
    sos = signal.zpk2sos(np.asarray(z_all), np.asarray(p_all), k_all)
    out = []
    for row in sos:
        b, a = row[:3].copy(), row[3:].copy()
        if b[2] == 0.0 and a[2] == 0.0:  # a first-order section: run it as one
            b, a = b[:2], a[:2]
        out.append((b, a))
    return out


def run_sections(sections, x: np.ndarray, zis: list[np.ndarray]) -> tuple[np.ndarray, list]:
    new = []
    for (b, a), zi in zip(sections, zis, strict=True):
        x, zf = iir(b, a, x, zi)
        new.append(zf)
    return x, new


def sections_response(sections, w: np.ndarray) -> np.ndarray:
    h = np.ones(w.size, complex)
    for b, a in sections:
        h *= signal.freqz(b, a, worN=w)[1]
    return h
