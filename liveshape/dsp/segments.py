"""Welch segment periodograms one by one, for estimators that weight each segment themselves.

Pure numpy/scipy. :class:`SegmentPowers` cuts a stream into the same segments as
:class:`liveshape.dsp.spectra.PsdAverager` (Hann by default, 50 % overlap, the mean of each
segment removed, scaled to a one-sided density) and hands out each segment's periodogram on
chosen lines instead of their average. The fast control loop weights them by the drive that
produced them (:mod:`liveshape.control.tracking`).

References
----------
.. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of power spectra: a
   method based on time averaging over short, modified periodograms", IEEE Trans. Audio
   Electroacoust. AU-15(2), 70-73, 1967.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from liveshape.dsp.welch_stream import WelchStream

__all__ = ["SegmentPowers", "SegmentSpectra"]


class _SegmentQueue(WelchStream):
    """The segments of one or more streams on chosen lines, handed out in order (the common
    part of :class:`SegmentPowers` and :class:`SegmentSpectra`)."""

    def __init__(self, fs_hz: float, nperseg: int, lines: np.ndarray, n_channels: int,
                 window: Any) -> None:
        super().__init__(fs_hz, nperseg, (0,) * int(n_channels), averaging="linear",
                         n_avg=None, window=window)
        self._lines = np.flatnonzero(np.asarray(lines, dtype=bool))
        if self._lines.size and (self._lines[0] == 0 or self._lines[-1] == self._n_lines - 1):
            raise ValueError(f"{type(self).__name__}: DC and Nyquist are not supported lines")
        self._done: list[np.ndarray] = []
        self._first = 0  # index of the first segment not yet popped

    @property
    def hop(self) -> int:
        """Samples between the starts of two segments."""
        return self._hop

    def reset(self) -> None:
        """Forget every sample and segment; the next segment is number 0 again."""
        self._reset_stream()
        self._done.clear()
        self._first = 0

    def _take(self, empty: np.ndarray) -> tuple[int, np.ndarray]:
        """``(i, rows)``: index of the first segment returned and every row done since the last
        call (``empty`` when there is none)."""
        i = self._first
        if not self._done:
            return i, empty
        out = self._done[0] if len(self._done) == 1 else np.concatenate(self._done)
        self._done.clear()
        self._first += out.shape[0]
        return i, out


class SegmentPowers(_SegmentQueue):
    """Periodogram of every complete segment of a stream on the lines ``lines`` (units²/Hz).

    Segment ``i`` (counted from 0 since the last :meth:`reset`) covers samples
    ``i·hop .. i·hop + nperseg − 1`` of the stream pushed since then. The linear average of the
    periodograms :meth:`pop` returns equals :func:`scipy.signal.welch` of the same samples on
    those lines (to rounding).

    Parameters
    ----------
    fs_hz : float
        Sampling rate in Hz.
    nperseg : int
        Segment length in samples (hop ``nperseg − nperseg // 2``).
    lines : ndarray of bool
        Mask over the ``nperseg // 2 + 1`` lines to return (DC and Nyquist are not scaled
        specially: leave them out).
    window : str or tuple, optional
        Window for :func:`scipy.signal.get_window` (default ``"hann"``).
    """

    def __init__(self, fs_hz: float, nperseg: int, lines: np.ndarray, *,
                 window: Any = "hann") -> None:
        super().__init__(fs_hz, nperseg, lines, 1, window)

    def push(self, x: np.ndarray) -> None:
        """Add a block of samples (1-D, any length); complete segments are transformed."""
        x = np.asarray(x, dtype=float)
        if x.ndim != 1:
            raise ValueError(f"SegmentPowers: push needs a 1-D block, got shape {x.shape}")
        if x.size:
            self._feed((x,))
            self._flush()

    def pop(self) -> tuple[int, np.ndarray]:
        """``(i, p)``: index of the first segment returned and their periodograms.

        ``p`` has one row per segment completed since the last call (possibly none) and one
        column per selected line, in units²/Hz.
        """
        return self._take(np.empty((0, self._lines.size)))

    def _accumulate(self, spectra: np.ndarray, coef: float | np.ndarray) -> None:
        sel = spectra[0][:, self._lines]
        p = sel.real * sel.real
        p += sel.imag * sel.imag
        p *= self._scale
        self._done.append(p)


class SegmentSpectra(_SegmentQueue):
    """Fourier coefficients of every complete segment of several streams on chosen lines.

    The segments are those of :class:`SegmentPowers` (the same window, overlap and mean
    removal). The coefficients are scaled so that ``|X|²`` is the one-sided density of the
    segment (units²/Hz) and ``conj(X_a)·X_b`` its cross density: their linear averages equal
    :func:`scipy.signal.welch` and :func:`scipy.signal.csd` of the same samples on those lines
    (to rounding).

    Parameters
    ----------
    fs_hz : float
        Sampling rate in Hz.
    nperseg : int
        Segment length in samples.
    lines : ndarray of bool
        Mask over the ``nperseg // 2 + 1`` lines to return (not DC nor Nyquist).
    n_channels : int
        Number of streams pushed side by side.
    window : str or tuple, optional
        Window for :func:`scipy.signal.get_window` (default ``"hann"``).
    """

    def __init__(self, fs_hz: float, nperseg: int, lines: np.ndarray, n_channels: int, *,
                 window: Any = "hann") -> None:
        super().__init__(fs_hz, nperseg, lines, n_channels, window)
        self._root = np.sqrt(self._scale)

    def push(self, rows: np.ndarray) -> None:
        """Add one block per stream: ``rows`` of shape ``(n_channels, n)``."""
        x = np.asarray(rows, dtype=float)
        if x.ndim != 2 or x.shape[0] != len(self._leads):
            raise ValueError(f"SegmentSpectra: push needs ({len(self._leads)}, n) rows, got "
                             f"shape {x.shape}")
        if x.shape[1]:
            self._feed(tuple(x))
            self._flush()

    def pop(self) -> tuple[int, np.ndarray]:
        """``(i, X)``: index of the first segment returned and the coefficients, complex, of
        shape ``(segments, n_channels, lines)``, scaled as in the class docstring."""
        return self._take(np.empty((0, len(self._leads), self._lines.size), dtype=complex))

    def _accumulate(self, spectra: np.ndarray, coef: float | np.ndarray) -> None:
        sel = spectra[:, :, self._lines] * self._root  # channels x m x lines
        self._done.append(np.ascontiguousarray(sel.transpose(1, 0, 2)))
