"""The discrete model of the simulated rig: trapezoidal (bilinear) discretization in modal
coordinates, and cascades of second-order sections.

Pure (numpy/scipy). :class:`ModalSystem` diagonalizes the trapezoidal discretization of a
continuous state-space model (the shaker with its payload, from
:func:`liveshape.rigs.plantmodel.electromechanical_ss`); its modal coordinates carry the physical
state from one model to another (coil resistance, resonance shift) without a jump, and give the
discrete transfer functions. :func:`highpass_sos` makes the Butterworth high-pass cascades of the
card, amplifier and sensor, and :func:`sosfilt_inplace` runs any cascade of second-order sections
with a carried state (the shaker's own cascades are in :mod:`liveshape.rigs.cascade`).

Discretization: the trapezoidal rule (bilinear transform, no prewarp) at the rig's sample rate
(Oppenheim & Schafer, "Discrete-Time Signal Processing", bilinear transformation).
"""

from __future__ import annotations

import math
from collections.abc import Iterable

import numpy as np
from scipy import signal

from liveshape.errors import ConfigError

try:  # the compiled core of scipy.signal.sosfilt, called without the wrapper's checks
    from scipy.signal._sosfilt import _sosfilt as _sosfilt_core
except ImportError:  # pragma: no cover - a scipy without it: the public function
    _sosfilt_core = None


def sosfilt_inplace(sos: np.ndarray, x: np.ndarray, zi: np.ndarray) -> None:
    """Filter ``x`` through the cascade ``sos`` in place, carrying the state ``zi`` in place.

    ``sos`` is ``(n_sections, 6)`` (``b0 b1 b2 1 a1 a2``, direct form II transposed), ``x`` a
    C-contiguous float64 ``(1, n)`` array, ``zi`` a C-contiguous float64 ``(1, n_sections, 2)``
    array. This is :func:`scipy.signal.sosfilt` without its checks and copies (they cost as much
    as filtering a few thousand samples), so the results are the same to the bit. Each sample
    passes through every section before the next is read, so a cascade of a few sections costs
    about as much as one. Where scipy's compiled core is not found, the public function is used.
    """
    if _sosfilt_core is None:  # pragma: no cover
        y, zf = signal.sosfilt(sos, x, axis=-1, zi=zi.reshape(-1, 1, 2))
        x[...] = y
        zi[...] = zf.reshape(zi.shape)
        return
    _sosfilt_core(sos, x, zi)


def sos_response(sos: np.ndarray, z: np.ndarray) -> np.ndarray:
    """Transfer function of the cascade ``sos`` at the complex points ``z``."""
    zi1, zi2 = 1.0 / z, 1.0 / (z * z)
    h = np.ones(z.shape, complex)
    for b0, b1, b2, _, a1, a2 in sos:
        h *= (b0 + b1 * zi1 + b2 * zi2) / (1.0 + a1 * zi1 + a2 * zi2)
    return h


def sos_freqz(sos: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Response of a cascade at ``w`` rad/sample, section by section (:func:`scipy.signal.freqz`;
    a first-order section as its two coefficients)."""
    h = np.ones(w.size, complex)
    for row in sos:
        b, a = row[:3], row[3:]
        if b[2] == 0.0 and a[2] == 0.0:
            b, a = b[:2], a[:2]
        h *= signal.freqz(b, a, worN=w)[1]
    return h


class ModalSystem:
    """Trapezoidal discretization of ``(A, B, C, D)`` in modal coordinates.

    With ``M1 = I - h A/2`` the discrete system is ``Ad = M1^-1 (I + h A/2)``, ``Bd = h M1^-1 B``,
    ``Cd = C M1^-1``, ``Dd = D + Cd h B/2`` (bilinear transform); its state relates to the
    physical one by ``x = M1^-1 (xd + h B u / 2)``. ``Ad`` shares the eigenvectors ``W`` of ``A``,
    with eigenvalues ``lam = (1 + h mu/2)/(1 - h mu/2)``. In the modal coordinates
    ``zeta = W^-1 xd`` each mode follows ``zeta[n+1] = lam zeta[n] + beta u[n]`` and output ``r``
    is ``y_r[n] = d_r u[n] + sum_k gamma_rk zeta_k[n]`` (``zeta`` is the state before sample
    ``n`` is read; complex modes come in conjugate pairs).
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
            self.w = self.winv = np.zeros((0, 0), complex)
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

    def physical(self, zeta: np.ndarray, u0: float) -> np.ndarray:
        """Physical state at the sample whose input is ``u0``, from the modal state ``zeta``."""
        if not self.n:
            return np.zeros(0)
        xd = (self.w @ zeta).real
        return np.linalg.solve(self.m1, xd + 0.5 * self.h * self.b * u0)

    def modal(self, x: np.ndarray, u0: float) -> np.ndarray:
        """Modal state of this model holding physical state ``x`` at the sample whose input is
        ``u0``."""
        if not self.n:
            return np.zeros(0, complex)
        return self.winv @ (self.m1 @ x - 0.5 * self.h * self.b * u0)

    def response(self, z: np.ndarray) -> np.ndarray:
        """Discrete transfer functions ``(n_out, len(z))`` at the points ``z``."""
        h = np.repeat(self.d[:, None].astype(complex), z.size, axis=1)
        for k in range(self.n):
            h += self.gamma[:, k:k + 1] * (self.beta[k] / (z - self.lam[k]))[None, :]
        return h


def highpass_sos(corners: Iterable[tuple[float | None, int]], gain: float, fs: float
                 ) -> np.ndarray | None:
    """Bilinear second-order sections ``(n, 6)`` of Butterworth high-passes in cascade, times
    ``gain``.

    ``corners`` are ``(f_hz, order)`` pairs; None corners are skipped; no corners at all gives
    None (a plain gain).
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
    return np.ascontiguousarray(signal.zpk2sos(np.asarray(z_all), np.asarray(p_all), k_all))
