"""A second, independent MRI simulator: the measuring stick for rawproof's analysers.

Its physical model differs from ``demo_data/synth.py``: textured head-, knee-
and abdomen-like objects with several tissue classes, bias fields and
background phase, rendered on a grid twice as fine and sampled in central
k-space; receive arrays of circular loops (Biot-Savart sensitivities) with
correlated noise; scanner reconstructions (zero-filling, raw filters, readout
oversampling, GRAPPA, SENSE, partial Fourier) and research-pipeline steps
(registration, reslicing, masking, normalisation, 8-bit archives).

``cases(split)`` is cheap: recipes and truths only; ``Case.materialise`` does
the numerics and writes the files.
"""

from __future__ import annotations

import pathlib
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from bench.sim2 import catalogue
from bench.sim2.truth import TRACE_IDS

__all__ = ["Case", "cases", "TRACE_IDS"]

_SPLIT_SEED = {"dev": 20_261_205, "heldout": 90_417_733}
_FULL_SIZE = 144


@dataclass
class Case:
    """One simulated dataset: a recipe, its truth, and how to write it."""

    name: str
    split: str
    route: str
    truth: dict
    recipe: dict = field(default_factory=dict, repr=False)
    seed: int = 0

    def materialise(self, folder: pathlib.Path) -> tuple[str, dict]:
        """Write the case's files into folder; return (path to analyse, kwargs for
        ``app.analysis.analyse_path``)."""
        folder = pathlib.Path(folder)
        return catalogue.build(self.route, self.recipe, folder)

    def describe(self) -> dict[str, Any]:
        """The case as JSON-able data (name, split, route, seed, recipe, truth)."""
        return {"name": self.name, "split": self.split, "route": self.route, "seed": self.seed,
                "recipe": self.recipe, "truth": self.truth}


def _route_sequence(n: int) -> list[str]:
    """Routes for ``n`` cases in proportion to their weights, interleaved."""
    names = list(catalogue.ROUTES)
    weights = np.array([catalogue.ROUTES[r][2] for r in names], float)
    counts = np.floor(weights / weights.sum() * n).astype(int)
    while counts.sum() < n:
        counts[np.argmax(weights / weights.sum() * n - counts)] += 1
    seq = []
    for i in range(counts.max()):
        seq.extend(r for r, c in zip(names, counts, strict=True) if i < c)
    return seq


def cases(split: str, *, quick: bool = False) -> list[Case]:
    """The deterministic case list of a split.

    Parameters
    ----------
    split : {"dev", "heldout"}
        The two splits draw from disjoint seeds (``seed = base(split) + index``
        with bases far apart).
    quick : bool
        About a dozen small cases (at most 128 px) covering the main routes,
        instead of the full split of about 140 cases.
    """
    if split not in _SPLIT_SEED:
        raise ValueError(f"split must be 'dev' or 'heldout', not {split!r}")
    routes = list(catalogue.QUICK_ROUTES) if quick else _route_sequence(_FULL_SIZE)
    tag = "d" if split == "dev" else "h"
    out = []
    for i, route in enumerate(routes):
        seed = _SPLIT_SEED[split] + (500_000 if quick else 0) + i
        rng = np.random.default_rng(seed)
        variant, recipe, truth = catalogue.sample(route, rng, quick)
        name = f"{route}_{variant}_{tag}{'q' if quick else ''}{i:04d}"
        out.append(Case(name, split, route, truth, recipe, seed))
    return out
