"""Textured anatomical objects (head, knee, abdomen) rendered on a fine grid.

Each object is a set of tissue classes bounded by level sets of perturbed
superellipses and of band-limited fractal noise, with a smooth multiplicative
bias field and a smooth background phase. Objects are rendered on a grid twice
as fine as the acquisition and their central k-space is taken, so the spectrum
reaches the edge of the acquired k-space as it does in a measurement.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.fft as sfft

KINDS = ("head", "knee", "abdomen")


def fractal_field(shape: tuple[int, ...], rng: np.random.Generator, *, beta: float = 3.2,
                  cutoff: float = 0.45) -> np.ndarray:
    """Zero-mean, unit-variance Gaussian field with a power spectrum ``|k|**-beta``.

    References
    ----------
    R. F. Voss, "Random fractal forgeries", in *Fundamental Algorithms for
    Computer Graphics*, Springer (1985) 805-835 (spectral synthesis of fBm).
    """
    freqs = np.meshgrid(*[sfft.fftfreq(n) for n in shape], indexing="ij")
    k = np.sqrt(sum(f**2 for f in freqs))
    k[(0,) * len(shape)] = 1.0
    amp = k ** (-beta / 2) * (k < cutoff)
    amp[(0,) * len(shape)] = 0.0
    white = rng.standard_normal(shape)
    f = sfft.ifftn(sfft.fftn(white, workers=1) * amp, workers=1).real
    return (f - f.mean()) / (f.std() + 1e-12)


def _superellipse_radius(x: np.ndarray, y: np.ndarray, a: float, b: float, p: float) -> np.ndarray:
    """Lamé curve level: 1 on the superellipse |x/a|**p + |y/b|**p = 1."""
    return (np.abs(x / a) ** p + np.abs(y / b) ** p) ** (1.0 / p)


@dataclass
class _Blob:
    cx: float
    cy: float
    a: float
    b: float
    p: float
    theta: float
    value: float
    harmonics: np.ndarray = field(default_factory=lambda: np.zeros((0, 3)))

    def level(self, x: np.ndarray, y: np.ndarray, scale: np.ndarray | float = 1.0) -> np.ndarray:
        """Normalised radius: < 1 inside. ``scale`` shrinks the shape (3D tapering)."""
        c, s = np.cos(self.theta), np.sin(self.theta)
        xr = (x - self.cx) * c + (y - self.cy) * s
        yr = -(x - self.cx) * s + (y - self.cy) * c
        rho = _superellipse_radius(xr, yr, self.a * scale, self.b * scale, self.p)
        ang = np.arctan2(yr, xr)
        wobble = 1.0
        for k, amp, ph in self.harmonics:
            wobble = wobble + amp * np.cos(k * ang + ph)
        return rho / wobble


def _blob(rng: np.random.Generator, cx: float, cy: float, a: float, b: float, value: float, *,
          p: tuple[float, float] = (1.8, 2.6), theta: float | None = None,
          wobble: float = 0.06) -> _Blob:
    ks = np.arange(2, 6)
    harm = np.stack([ks, rng.uniform(0, wobble, ks.size) / ks ** 0.5,
                     rng.uniform(0, 2 * np.pi, ks.size)], axis=1)
    return _Blob(cx, cy, a, b, rng.uniform(*p), rng.uniform(0, np.pi) if theta is None else theta,
                 value, harm)


@dataclass
class Anatomy:
    """A randomly drawn anatomy; :meth:`render` evaluates it on any coordinates.

    Coordinates are in units of the half field of view (the object sits in
    [-1, 1] x [-1, 1]); z in [-1, 1] spans a 3D slab and tapers the shapes.
    """

    kind: str
    outer: _Blob
    layers: list[tuple[float, float]]           # (level, value): rings inside the outer boundary
    organs: list[_Blob]
    partition: tuple[float, float, float]       # (threshold, value_low, value_high) textured zone
    partition_level: float
    texture: float
    bias: np.ndarray                            # polynomial coefficients of log bias
    phase: np.ndarray                           # polynomial coefficients of background phase
    seed: int

    def _taper(self, z: np.ndarray) -> np.ndarray:
        """Shape scale along the slab: a head narrows towards its top and base."""
        if self.kind == "head":
            return np.sqrt(np.clip(1 - 0.55 * z**2, 0.05, None))
        return 1.0 - 0.1 * z**2

    def render(self, x: np.ndarray, y: np.ndarray, z: np.ndarray | float = 0.0,
               noise: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
        """Complex object (with bias field and background phase) on the given coordinates.

        Returns complex128 of the broadcast shape of ``x``, ``y``, ``z``.
        """
        z = np.asarray(z, dtype=float)
        taper = self._taper(z)
        x, y, z = np.broadcast_arrays(x, y, z)
        if noise is None:
            rng = np.random.default_rng(self.seed)
            noise = (fractal_field(x.shape, rng), fractal_field(x.shape, rng, beta=2.4))
        part_noise, tex_noise = noise
        lev = self.outer.level(x, y, taper)
        img = np.zeros(x.shape)
        img[lev < 1] = self.layers[0][1] if self.layers else 0.5
        for level, value in self.layers:
            img[lev < level] = value
        # the textured parenchyma (grey/white matter, muscle, liver, bowel)
        inner = lev < self.partition_level
        thr, v_lo, v_hi = self.partition
        img[inner] = np.where(part_noise[inner] > thr, v_hi, v_lo)
        for organ in self.organs:
            inside = organ.level(x, y, taper) < 1
            img[inside & (lev < 1)] = organ.value
        img *= 1 + self.texture * np.tanh(tex_noise)
        img = np.clip(img, 0, None)
        terms = _poly_terms(x, y, z)
        bias = np.exp(np.tensordot(self.bias, terms, axes=(0, 0)))
        phase = np.tensordot(self.phase, terms, axes=(0, 0))
        return img * bias * np.exp(1j * phase)

    def support(self, x: np.ndarray, y: np.ndarray, z: np.ndarray | float = 0.0) -> np.ndarray:
        """Boolean mask of the object (inside the outer boundary)."""
        z = np.asarray(z, dtype=float)
        taper = self._taper(z)
        x, y, z = np.broadcast_arrays(x, y, z)
        return self.outer.level(x, y, taper) < 1


def _poly_terms(x: np.ndarray, y: np.ndarray, z: np.ndarray) -> np.ndarray:
    return np.stack([x, y, z, x * y, x**2 - y**2, x**2 + y**2, x * z, y * z])


def draw_anatomy(kind: str, rng: np.random.Generator) -> Anatomy:
    """Draw a head-, knee- or abdomen-like anatomy with random shape, contrast and fields.

    References
    ----------
    G. Lamé (1818) superellipses; tissue contrasts are invented, loosely T1-weighted
    (values recalled from memory, common practice, no source).
    """
    u = rng.uniform
    seed = int(rng.integers(2**31))
    bias = np.concatenate([u(-0.25, 0.25, 3), u(-0.15, 0.15, 5)])
    phase = np.concatenate([u(-2.5, 2.5, 3), u(-1.2, 1.2, 5)])
    if kind == "head":
        outer = _blob(rng, u(-0.05, 0.05), u(-0.05, 0.05), u(0.6, 0.72), u(0.74, 0.86), 0.9,
                      p=(2.0, 2.5), theta=u(-0.15, 0.15), wobble=0.05)
        layers = [(1.0, u(0.8, 1.0)), (0.93, u(0.03, 0.08)), (0.87, u(0.12, 0.2))]
        organs = [_blob(rng, s * u(0.06, 0.12), u(-0.2, 0.05), u(0.04, 0.08), u(0.15, 0.28),
                        u(0.1, 0.2), theta=s * u(0.1, 0.4)) for s in (-1, 1)]
        partition = (u(-0.3, 0.3), u(0.45, 0.6), u(0.7, 0.85))
        plevel = 0.84
    elif kind == "knee":
        outer = _blob(rng, u(-0.08, 0.08), 0.0, u(0.55, 0.7), u(0.82, 0.92), 0.9,
                      p=(1.8, 2.3), theta=u(-0.2, 0.2), wobble=0.08)
        layers = [(1.0, u(0.85, 1.0)), (0.9, u(0.3, 0.4))]
        fem = _blob(rng, u(-0.05, 0.05), u(-0.45, -0.3), u(0.3, 0.38), u(0.3, 0.4), u(0.75, 0.9),
                    theta=0.0)
        tib = _blob(rng, u(-0.05, 0.05), u(0.35, 0.5), u(0.3, 0.38), u(0.22, 0.3), u(0.7, 0.85),
                    theta=0.0)
        cart = [_Blob(b.cx, b.cy, b.a * 1.07, b.b * 1.07, b.p, b.theta, u(0.45, 0.55), b.harmonics)
                for b in (fem, tib)]
        cortex = [_Blob(b.cx, b.cy, b.a * 1.03, b.b * 1.03, b.p, b.theta, 0.02, b.harmonics)
                  for b in (fem, tib)]
        patella = _blob(rng, u(0.4, 0.5), u(-0.25, -0.1), u(0.06, 0.1), u(0.12, 0.18),
                        u(0.7, 0.85))
        organs = cart + cortex + [fem, tib, patella]
        partition = (u(0.6, 1.2), u(0.3, 0.38), u(0.8, 0.95))     # fat streaks in muscle
        plevel = 0.9
    elif kind == "abdomen":
        outer = _blob(rng, 0.0, u(-0.05, 0.05), u(0.86, 0.94), u(0.55, 0.68), 0.9,
                      p=(2.3, 3.2), theta=u(-0.05, 0.05), wobble=0.04)
        layers = [(1.0, u(0.85, 1.0)), (0.9, u(0.3, 0.4))]
        liver = _blob(rng, u(-0.45, -0.3), u(-0.15, 0.0), u(0.3, 0.42), u(0.28, 0.38),
                      u(0.45, 0.55), wobble=0.12)
        kidneys = [_blob(rng, s * u(0.3, 0.4), u(0.2, 0.3), u(0.08, 0.12), u(0.13, 0.18),
                         u(0.55, 0.7)) for s in (-1, 1)]
        spine = _blob(rng, 0.0, u(0.35, 0.42), u(0.09, 0.12), u(0.09, 0.12), u(0.6, 0.75),
                      p=(1.9, 2.1))
        aorta = _blob(rng, u(0.05, 0.1), u(0.18, 0.24), 0.04, 0.04, u(0.9, 1.0), p=(2, 2.01))
        organs = [liver, *kidneys, spine, aorta]
        partition = (u(-0.2, 0.4), u(0.25, 0.4), u(0.55, 0.7))    # bowel loops
        plevel = 0.86
    else:
        raise ValueError(f"unknown anatomy {kind!r}; choose one of {KINDS}")
    return Anatomy(kind, outer, layers, organs, partition, plevel, u(0.03, 0.08), bias, phase,
                   seed)


def fine_grid(shape: tuple[int, ...], fov: tuple[float, ...]) -> list[np.ndarray]:
    """Sample positions (units of the object's half field of view) of a grid twice as fine.

    ``shape`` is the acquired matrix, ``fov`` each axis' field of view in units of
    the object's half width (2.0 = just the object, 4.0 = twice oversampled).
    """
    axes = []
    for n, f in zip(shape, fov, strict=True):
        m = 2 * n
        axes.append((np.arange(m) - m // 2) * (f / m))
    return axes
