"""Envelope (demodulation) spectra: how the energy in a high carrier band
is modulated.

A bearing defect strikes at its defect frequency; each strike rings the
structure at a high resonance. The raw spectrum shows that resonance, but the
strike rate shows only in how its amplitude rises and falls. So, per frame:
remove the mean, keep only the carrier band (an FFT mask that also builds the
analytic signal), take the magnitude (the envelope), and hand the envelope
frame to an ordinary `SpectralStage`, which windows, transforms and averages
it like any other signal. Band values on it are RMS in the source unit.
"""

from typing import Optional, Tuple

import numpy as np

from .spectrum import SpectralStage, Spectrum


class EnvelopeStage:
    def __init__(self, sample_rate: float, size: int, window: str, averages: int, channels: int,
                 carrier_hz: Tuple[float, float]) -> None:
        lo, hi = carrier_hz
        if not 0 <= lo < hi <= sample_rate / 2:
            raise ValueError(f"{carrier_hz=} is not inside 0..{sample_rate / 2:g} Hz")
        freqs = np.fft.fftfreq(size, 1.0 / sample_rate)
        # Analytic-signal mask of the carrier band: positive frequencies
        # doubled, negative ones dropped (the Hilbert transform in the
        # frequency domain, as scipy.signal.hilbert builds it).
        self._mask = np.where((freqs >= lo) & (freqs <= hi), 2.0, 0.0)
        self.spectral = SpectralStage(sample_rate, size, window, averages, channels)
        self.carrier_hz = carrier_hz

    def reset(self) -> None:
        self.spectral.reset()

    def envelope(self, frame: np.ndarray) -> np.ndarray:
        """Envelope of the carrier band of each row of `frame` (channels, size)."""
        centred = frame - frame.mean(axis=1, keepdims=True)
        analytic = np.fft.ifft(np.fft.fft(centred, axis=1) * self._mask, axis=1)
        return np.abs(analytic)

    def push(self, frame: np.ndarray) -> Optional[Spectrum]:
        return self.spectral.push(self.envelope(frame))
