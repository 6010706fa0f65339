"""What the monitor hands out: a `Result` per hop, and read-only views of
its bands and health checks (`BandState`, `CheckState`), for observers
(`Monitor.add_observer`), the view and replay. Nothing here changes the
monitor."""

from dataclasses import dataclass
from functools import cached_property
from typing import Callable, List, Optional, Tuple

import numpy as np

from ..analyse.bands import BandBank, BandValue
from ..analyse.peaks import interpolate_peak
from ..analyse.spectrum import Spectrum
from ..config import BandConfig


@dataclass
class Result:
    """Everything measured at one hop. What rules do not need (the dominant
    peak, broadband velocity) is computed on first use: most results only
    feed the rules, and only summaries and events read the rest."""

    stream_s: float
    speed_hz: Optional[float]
    spectrum: Spectrum
    bands: List[BandValue]
    bank: BandBank
    envelope: Optional[Spectrum] = None
    speed_s: Optional[float] = None  # stream time speed_hz was read at; None if nominal

    @cached_property
    def dominant(self) -> Tuple[np.ndarray, np.ndarray]:
        """Frequency and RMS of each channel's strongest line above DC's lobe."""
        spec = self.spectrum
        return interpolate_peak(spec.rms_amplitude, spec.window, spec.bin_hz, spec.window.main_lobe,
                                spec.psd.shape[1] - 1)

    @property
    def dominant_hz(self) -> np.ndarray:
        return self.dominant[0]

    @property
    def dominant_rms(self) -> np.ndarray:
        return self.dominant[1]

    @cached_property
    def velocity_rms(self) -> np.ndarray:
        return self.bank.velocity_rms(self.spectrum)


@dataclass(frozen=True)
class BandState:
    """One band on one channel as the monitor holds it now: the latest value
    (None before the first result), the level, and the limits the level
    machine uses (learned ones once a baseline is known)."""

    band: BandConfig
    channel: str
    unit: str
    value: Optional[float]
    level: str
    warning: Optional[float]
    alarm: Optional[float]
    learning: bool  # a baseline is still being learned


@dataclass(frozen=True)
class CheckState:
    """One health check now."""

    name: str
    channel: Optional[str]
    level: str
    value: Optional[float]
    unit: str


Observer = Callable[[Result], None]
