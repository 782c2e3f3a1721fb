"""The simulated line camera: photoelectrons to raw 16-bit counts.

Photoelectron shot noise (exact Poisson or its normal limit), read noise in e-, gain in e-/count, a
fixed per-pixel dark offset, rounding to whole counts and clipping at saturation. Works on mean
photoelectrons that the bench computes, given either as a matrix or, for speed, as per-shot coefficients
of a few spectra; it knows nothing of lasers, samples or delays.
"""

from __future__ import annotations

import numpy as np

from .normals import NormalSource
from .settings import NoiseSwitches

__all__ = ["DetectorModel"]


class DetectorModel:
    """One camera: its gain, read noise, dark offset pattern and saturation.

    Parameters
    ----------
    gain_e_per_count:
        Photoelectrons per count.
    read_noise_e:
        Rms read noise, in e-.
    dark_offset_counts:
        (px,) dark level of each pixel, in counts (mean dark plus the fixed pattern).
    saturation_counts:
        Highest count the camera returns (≤ 65535).
    switches:
        Noise switches (``photon_noise`` and ``read_noise`` act here).
    photon_statistics:
        "poisson" (exact draws) or "gaussian" (normal limit N + sqrt(N)·z, read noise added in quadrature).
    rng:
        Source of random numbers for the Poisson draws.
    normals:
        Source of standard-normal draws (read noise, normal-limit photon noise).
    """

    def __init__(self, gain_e_per_count: float, read_noise_e: float, dark_offset_counts: np.ndarray,
                 saturation_counts: int, switches: NoiseSwitches, photon_statistics: str,
                 rng: np.random.Generator, normals: NormalSource) -> None:
        self.gain_e_per_count = float(gain_e_per_count)
        self.read_noise_e = float(read_noise_e) if switches.read_noise else 0.0
        self.dark_offset_counts = np.asarray(dark_offset_counts, dtype=np.float32)
        self.saturation_counts = int(saturation_counts)
        self.photon_noise = bool(switches.photon_noise)
        self.poisson = photon_statistics == "poisson"
        self._rng = rng
        self._normals = normals
        self._work: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None

    # -- entry points --------------------------------------------------------------------------------
    def read_mean(self, mean_e: np.ndarray, out: np.ndarray) -> np.ndarray:
        """Raw counts for mean photoelectrons ``mean_e`` (c, px); written into ``out`` (c, px) uint16."""
        mean = np.ascontiguousarray(mean_e, dtype=np.float32)
        coeffs = np.ones((mean.shape[0], 1), dtype=np.float32)
        return self._read(coeffs, None, mean, out)

    def read_linear(self, coeffs: np.ndarray, basis_e: np.ndarray, out: np.ndarray) -> np.ndarray:
        """Raw counts for mean photoelectrons ``coeffs @ basis_e``.

        ``coeffs`` is (c, k) per-shot weights, ``basis_e`` (k, px) spectra in photoelectrons; the result
        goes into ``out`` (c, px) uint16. Same statistics as :meth:`read_mean`, a few times faster.
        """
        return self._read(np.asarray(coeffs, dtype=np.float32), np.asarray(basis_e, dtype=np.float32), None, out)

    # -- shared path ---------------------------------------------------------------------------------
    def _scratch(self, shape: tuple[int, ...]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Three float32 work arrays of ``shape``, reused between calls (fresh pages are slow to fill)."""
        if self._work is None or self._work[0].shape[0] < shape[0] or self._work[0].shape[1:] != shape[1:]:
            self._work = tuple(np.empty(shape, dtype=np.float32) for _ in range(3))  # type: ignore[assignment]
        return tuple(w[: shape[0]] for w in self._work)  # type: ignore[return-value]

    def _read(self, coeffs: np.ndarray, basis_e: np.ndarray | None, mean: np.ndarray | None,
              out: np.ndarray) -> np.ndarray:
        g = np.float32(self.gain_e_per_count)
        rn = np.float32(self.read_noise_e)
        c = coeffs.shape[0]
        y, var, z = self._scratch(out.shape)
        if self.photon_noise and self.poisson:
            if mean is None:
                mean = np.einsum("ck,kp->cp", coeffs, basis_e, out=var)
            np.copyto(y, self._rng.poisson(np.maximum(mean, 0.0)), casting="unsafe")
            if rn > 0:
                y += rn * self._normals.fill(z)
            y /= g
            y += self.dark_offset_counts
        else:
            # y = mean / g + dark as one product of weights and spectra (einsum, not BLAS: BLAS threads
            # would spin on the core the noise thread needs); var = mean / g^2 + (rn / g)^2 from y.
            if mean is None:
                aug = np.hstack([coeffs, np.ones((c, 1), dtype=np.float32)])
                np.einsum("ck,kp->cp", aug, np.vstack([basis_e / g, self.dark_offset_counts]), out=y)
            else:
                np.add(mean / g, self.dark_offset_counts, out=y)
            if self.photon_noise or rn > 0:
                self._normals.fill(z)
                if self.photon_noise:
                    np.subtract(y, self.dark_offset_counts, out=var)
                    var *= 1.0 / g
                    var += (rn / g) ** 2
                    np.maximum(var, 0.0, out=var)
                    np.sqrt(var, out=var)
                    z *= var
                else:
                    z *= rn / g
                y += z
        np.rint(y, out=y)
        np.clip(y, 0.0, float(self.saturation_counts), out=y)
        np.copyto(out, y, casting="unsafe")
        return out
