"""An invented machine for demos and tests.

The machine is made up: a shaft turning at `sim_rpm` with a slow speed wander
of +-0.3 %, vibration at 1x, 2x, 3x... with peak accelerations
`sim_harmonics`, a 1x (imbalance-like) component that grows by `sim_growth`
per minute of stream time, and broadband Gaussian noise of RMS `sim_noise`.
Channel i sees the machine with gain 1 / (1 + 0.4 i) and a phase shift of
90 degrees times i, as two sensors at right angles would. Values are in the
source unit; the same seed gives the same samples.
"""

import math
from typing import Optional

import numpy as np

from ...config import SourceConfig
from ..block import Block
from .base import Source

_BLOCK_SECONDS = 0.05
_WANDER = 0.003
_WANDER_PERIOD_S = 37.0


class SimulatorSource(Source):
    kind = "simulator"

    def __init__(self, config: SourceConfig) -> None:
        super().__init__(config)
        assert config.simulator is not None
        self.sim = config.simulator
        self.block = max(1, int(round(config.sample_rate * _BLOCK_SECONDS)))
        self._rng = np.random.default_rng(self.sim.seed)
        self._phase = 0.0
        self._n = 0
        self._gains = 1.0 / (1.0 + 0.4 * np.arange(self.channels))
        self._shifts = 0.5 * math.pi * np.arange(self.channels)
        self._total = int(round(self.sim.seconds * config.sample_rate)) if self.sim.seconds > 0 else None

    def _open(self) -> None:
        pass

    def _read(self, timeout: float) -> Optional[Block]:
        n = self.block
        if self._total is not None:
            n = min(n, self._total - self._n)
            if n <= 0:
                self.ended = True
                return None
        fs = self.sample_rate
        t = (self._n + np.arange(n)) / fs
        f0 = self.sim.rpm / 60.0
        speed = f0 * (1.0 + _WANDER * np.sin(2 * math.pi * t / _WANDER_PERIOD_S))
        # Integrate the speed so the phase stays continuous across blocks.
        phase = self._phase + 2 * math.pi * np.cumsum(speed) / fs
        self._phase = float(phase[-1])
        out = np.empty((n, self.channels))
        for c in range(self.channels):
            x = np.zeros(n)
            for order, amplitude in enumerate(self.sim.harmonics, start=1):
                if order == 1:
                    amplitude = amplitude + self.sim.growth * t / 60.0
                x += amplitude * np.sin(order * (phase + self._shifts[c]))
            out[:, c] = self._gains[c] * x
        if self.sim.noise > 0:
            out += self._rng.normal(0.0, self.sim.noise, size=out.shape)
        self._n += n
        return Block(samples=out)
