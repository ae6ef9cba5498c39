"""The host talks to a version-1 board (SPEC.md section 9): the mock device emulates one."""

from __future__ import annotations

import sys

from autotune.simdevice import launch
from protocol import messages as m
from protocol.link import Link


def test_host_falls_back_to_version_1() -> None:
    sim = launch([sys.executable, "-m", "mock_device", "--plant", "cart-wheel", "--pty",
                  "--speed", "5", "--protocol-version", "1"], "cart-wheel", 5.0)
    try:
        with Link.open(sim.url) as link:
            info = link.handshake()
            assert info.protocol_version == 1
            assert info.pv_resolution == 0.0  # a version-1 HelloReply declares none
            assert info.device_name == "cart-wheel" and info.tick_us == 10000
            link.request(m.Stream(0, 1, 1))
            assert link.next_sample(timeout=2.0) is not None  # the rest is the same protocol
    finally:
        sim.close()
    assert "refused a host speaking protocol version 2" in sim.stderr_text()
