"""Overlapped, windowed, averaged spectra in fixed memory.

Each frame of `size` samples (all channels at once) has its mean removed, is
windowed and transformed; its one-sided power goes into a ring of the last
`averages` frames. A result is the mean of that ring: exactly what
scipy.signal.welch returns for the same samples, window, segment length and
overlap with detrend="constant". Frames need not be contiguous: after a gap
in the samples the ring keeps the power of the frames before it, so the
average is that of the last `averages` gap-free frames.

Every spectral quantity comes from `Spectrum`, one averaged one-sided power
spectral density with its scale factors attached: the power spectrum, the
RMS amplitude spectrum and band powers are all read from it.
"""

from dataclasses import dataclass
from typing import Optional

import numpy as np

from .windows import Window


@dataclass
class Spectrum:
    """An averaged one-sided power spectral density, (channels, bins).

    psd        unit**2 / Hz, as scipy.signal.welch(scaling="density")
    bin_hz     spacing of the lines, sample_rate / size
    enbw_hz    equivalent noise bandwidth of the window, in Hz
    """

    psd: np.ndarray
    bin_hz: float
    enbw_hz: float
    window: Window

    @property
    def freqs(self) -> np.ndarray:
        return np.arange(self.psd.shape[-1]) * self.bin_hz

    @property
    def power(self) -> np.ndarray:
        """Power spectrum, unit**2 per line, as welch(scaling="spectrum"):
        a tone of RMS r that sits on a bin reads r**2 there."""
        return self.psd * self.enbw_hz

    @property
    def rms_amplitude(self) -> np.ndarray:
        """RMS amplitude spectrum, corrected for the window's coherent gain."""
        return np.sqrt(self.power)


class SpectralStage:
    """Turns frames into averaged spectra, keeping `averages` frames of power."""

    def __init__(self, sample_rate: float, size: int, window: str, averages: int, channels: int) -> None:
        if size & (size - 1) or size < 4:
            raise ValueError(f"{size=} is not a power of two")
        self.sample_rate = float(sample_rate)
        self.size = size
        self.window = Window(window, size)
        self.averages = averages
        self.bin_hz = self.sample_rate / size
        self.enbw_hz = self.window.enbw_bins * self.bin_hz
        # Density scaling of welch: 1 / (fs * sum(w^2)), doubled off DC/Nyquist.
        scale = np.full(size // 2 + 1, 2.0 / (self.sample_rate * self.window.sum_sq))
        scale[0] /= 2.0
        scale[-1] /= 2.0  # size is even, so the last line is Nyquist
        self._scale = scale
        self._ring = np.zeros((averages, channels, size // 2 + 1))
        self._filled = 0
        self._next = 0
        self._frame = np.zeros((channels, size))
        self._mean = np.zeros((channels, 1))
        self._window = self.window.samples
        # The transform writes into one buffer kept for the stage where numpy
        # takes `out` (2.0 and later): no fresh 16-byte-per-line result and
        # its page faults every hop. Older numpy allocates it each time.
        self._spectrum: Optional[np.ndarray] = np.empty((channels, size // 2 + 1), dtype=complex)
        try:
            np.fft.rfft(self._frame, axis=1, out=self._spectrum)
        except TypeError:
            self._spectrum = None

    def reset(self) -> None:
        """Forget every frame (after an outage longer than a result's span)."""
        self._filled = 0
        self._next = 0

    @property
    def ready(self) -> bool:
        return self._filled >= self.averages

    def push(self, frame: np.ndarray) -> Optional[Spectrum]:
        """Add one frame, shape (channels, size); return the new average once
        `averages` frames are in."""
        # Means as ndarray.mean takes them (np.add.reduce, then a divide), so
        # the numbers are the same, without its Python wrapper: every hop.
        mean = np.add.reduce(frame, axis=1, keepdims=True, out=self._mean)
        np.divide(mean, self.size, out=mean)
        np.subtract(frame, mean, out=self._frame)
        np.multiply(self._frame, self._window, out=self._frame)
        if self._spectrum is not None:
            spectrum = np.fft.rfft(self._frame, axis=1, out=self._spectrum)
        else:
            spectrum = np.fft.rfft(self._frame, axis=1)
        # |X|^2 as the sum of squared real and imaginary parts, squared in
        # place in a float view of the transform (nothing else reads it).
        parts = spectrum.view(np.float64)
        np.square(parts, out=parts)
        power = self._ring[self._next]
        np.add(parts[:, 0::2], parts[:, 1::2], out=power)
        np.multiply(power, self._scale, out=power)
        self._next = (self._next + 1) % self.averages
        if self._filled < self.averages:
            self._filled += 1
            if self._filled < self.averages:
                return None
        # The mean over the ring as ndarray.mean takes it: np.add.reduce over
        # the slots (slot 0, then each further slot added in order, into a
        # fresh array), then divided.
        psd = np.add.reduce(self._ring, axis=0)
        np.divide(psd, self.averages, out=psd)
        return Spectrum(psd, self.bin_hz, self.enbw_hz, self.window)
