"""Write the benchmark flows' input: 8 Mi samples of complex Gaussian noise, cf32, seed 1 (64 MiB).

    python flows/bench/make-noise.py            # writes flows/bench/noise.cf32

Noise, not a recording: every channel carries the same load and nothing in it is anyone's traffic.
"""

from pathlib import Path

import numpy as np

SAMPLES = 8 * 1024 * 1024

if __name__ == "__main__":
    rng = np.random.default_rng(1)
    path = Path(__file__).with_name("noise.cf32")
    with path.open("wb") as out:
        for _ in range(SAMPLES // (1 << 20)):
            block = rng.standard_normal(2 << 20, dtype=np.float32) * np.float32(0.1)
            block.tofile(out)
    print(f"{path}: {SAMPLES} samples")
