"""`autotune check` states the link budget and names an overfull stream as the cause."""

from __future__ import annotations

import subprocess
import sys

from autotune.simdevice import launch


def test_check_names_the_budget_when_the_stream_exceeds_the_link() -> None:
    # 1 ms tick, UART pacing at 115 200 baud: every tick's sample needs 26 000 B/s of the
    # 11 520 B/s the line carries, so about half the samples are lost (the mock device drops
    # what its transmit buffer cannot hold); the thinned stream loses none
    sim = launch([sys.executable, "-m", "mock_device", "--plant", "cart-wheel", "--pty",
                  "--period", "0.001", "--baud", "115200"], "cart-wheel", 1.0)
    try:
        p = subprocess.run([sys.executable, "-m", "autotune", "check", "--port", sim.url,
                            "--pings", "5", "--samples-time", "1"], capture_output=True,
                           text=True, timeout=120)
    finally:
        sim.close()
    out = p.stdout
    assert "the stream needs 26,000 B/s" in out and "the link carries 11,520 B/s" in out, out
    assert "host loop: DOES NOT FIT" in out and "device loop: ok" in out
    assert "not because of the wiring" in out and "cable" not in out
    assert "with every 3rd sample, 3 ms apart" in out and ", 0 lost" in out
    assert p.returncode == 0 and "result      ok" in out, out
