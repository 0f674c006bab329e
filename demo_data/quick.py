"""Write one small generated candidate file for a first ``rawproof analyse`` run.

An invented "Harbourview imaging group" magnitude archive: 8-coil acquisition at
96 x 96, zero-filled 2x to 192 x 192, combined by root-sum-of-squares.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from demo_data import synth

OUT = Path(__file__).resolve().parent / "out"


def main() -> Path:
    OUT.mkdir(exist_ok=True)
    mag, _ = synth.zero_filled_magnitude((96, 96), (2.0, 2.0), n_coils=8, n_slices=6, seed=7)
    scaled = np.round(mag / mag.max() * 4000).astype(np.uint16)
    path = OUT / "quick_zero_filled.npy"
    np.save(path, scaled)
    print(path)
    return path


if __name__ == "__main__":
    main()
