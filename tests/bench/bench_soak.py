"""The hour-long soak: one simulated hour of relay on a noisy link (tests/integration/test_soak.py
runs ten minutes of it in the suite). Prints its figures.

`python tests/bench/bench_soak.py [DEVICE_SECONDS [SPEED]]` (default 3600 at speed 100).
"""

from __future__ import annotations

import sys
import time
from pathlib import Path
from tempfile import TemporaryDirectory

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from tests.integration.test_soak import soak  # noqa: E402


def main() -> None:
    seconds = float(sys.argv[1]) if len(sys.argv) > 1 else 3600.0
    speed = float(sys.argv[2]) if len(sys.argv) > 2 else 100.0
    with TemporaryDirectory() as d:
        t0 = time.monotonic()
        f = soak(Path(d), seconds, speed)
        wall = time.monotonic() - t0
    print(f"soak: {f['device_seconds']:g} s device time at speed {f['speed']:g} "
          f"({wall:.0f} s wall), {f['samples']:.0f} samples, {f['cycles']:.0f} cycles, sample "
          f"loss {f['loss']:.3f} (predicted {f['loss_predicted']:.3f}), "
          f"{f['rejected']:.0f} frames rejected, memory growth {f['memory_growth_bytes']:.0f} B "
          f"over {f['over_samples']:.0f} samples, {f['bytes_per_sample']:.0f} B per sample "
          f"(allowed {f['bytes_per_sample_allowed']:.0f})")


if __name__ == "__main__":
    main()
