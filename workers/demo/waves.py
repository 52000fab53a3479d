"""Smooth random fields of the demo world: sums of plane waves, evaluated pointwise, on the
axes of a regular grid by one matrix product, or on a near-affine 2-D array of positions (a
reprojected raster) by the compiled split of workers/demo/wave_kernels.py."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from demaudit.workers.demo.wave_kernels import near_affine_waves


@dataclass(frozen=True, eq=False)
class Waves:
    """A sum of plane waves, sum(a * cos(kx * x + ky * y + phase)); x, y in any one unit."""

    kx: np.ndarray
    ky: np.ndarray
    phase: np.ndarray
    amplitude: np.ndarray

    def __call__(self, x: np.ndarray, y: np.ndarray | float = 0.0) -> np.ndarray:
        if is_grid(x, y):
            return self._on_grid(np.asarray(x), np.asarray(y))
        if np.ndim(x) == 2:  # a reprojected raster's positions: see wave_kernels
            xs = np.asarray(x, dtype=float)
            ys = np.ascontiguousarray(np.broadcast_to(np.asarray(y, dtype=float), xs.shape))
            fast = near_affine_waves(
                xs, ys, kx=self.kx, ky=self.ky, phase=self.phase, amplitude=self.amplitude
            )
            if fast is not None:
                return fast
        out = np.zeros(np.broadcast(x, y).shape)
        for kx, ky, phase, amplitude in zip(
            self.kx, self.ky, self.phase, self.amplitude, strict=True
        ):
            out += amplitude * np.cos(kx * x + ky * y + phase)
        return out

    def _on_grid(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """The waves on a grid, x of shape (1, n) and y of shape (m, 1), as an (m, n) array.

        cos(a + b) = cos a cos b - sin a sin b: 4 (m + n) cosines and sines per wave and one
        matrix product instead of m n cosines. Equal to the pointwise sum within a few 1e-15 of
        the amplitudes (the rounding of the phase differs).
        """
        a = self.kx[:, None] * x[0][None, :]  # (waves, n)
        b = self.ky[:, None] * y[:, 0][None, :] + self.phase[:, None]  # (waves, m)
        amplitude = self.amplitude[:, None]
        rows = np.concatenate([amplitude * np.cos(b), -amplitude * np.sin(b)]).T  # (m, 2 waves)
        cols = np.concatenate([np.cos(a), np.sin(a)])  # (2 waves, n)
        return np.asarray(rows @ cols)


def is_grid(x: np.ndarray | float, y: np.ndarray | float) -> bool:
    """True for the axes of a regular grid: x of shape (1, n) and y of shape (m, 1)."""
    return (
        isinstance(x, np.ndarray)
        and isinstance(y, np.ndarray)
        and x.ndim == 2
        and y.ndim == 2
        and x.shape[0] == 1
        and y.shape[1] == 1
    )


def random_waves(
    rng: np.random.Generator, amplitudes: tuple[float, ...], wavelengths: tuple[float, float]
) -> Waves:
    """Plane waves with the given amplitudes, random directions, wavelengths and phases."""
    count = len(amplitudes)
    wavenumber = 2 * np.pi / rng.uniform(*wavelengths, count)
    direction = rng.uniform(0, np.pi, count)
    return Waves(
        kx=wavenumber * np.cos(direction),
        ky=wavenumber * np.sin(direction),
        phase=rng.uniform(0, 2 * np.pi, count),
        amplitude=np.asarray(amplitudes, dtype=float),
    )


def unit_field(rng: np.random.Generator, wavelengths: tuple[float, float]) -> Waves:
    """A smooth random field of zero mean and unit variance (six plane waves)."""
    return random_waves(rng, (math.sqrt(2 / 6),) * 6, wavelengths)


def wander(rng: np.random.Generator, amplitudes: tuple[float, ...]) -> Waves:
    """A smooth 1-D wander: harmonic i + 1 of the unit interval has amplitude amplitudes[i]."""
    count = len(amplitudes)
    return Waves(
        kx=2 * np.pi * np.arange(1, count + 1),
        ky=np.zeros(count),
        phase=rng.uniform(0, 2 * np.pi, count),
        amplitude=np.asarray(amplitudes, dtype=float),
    )
