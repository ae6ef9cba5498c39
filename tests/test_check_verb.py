"""`autotune check` and `autotune ports`: end to end against the simulated board, and the
messages a user meets (no such port, nothing answers, wrong protocol version)."""

from __future__ import annotations

import argparse
import os
import threading

import pytest

from autotune.commands import check, ports
from autotune.errors import EXIT_LINK, EXIT_OK, UserError
from protocol import messages as m
from protocol.framing import FrameDecoder


def _args(module: object, *argv: str) -> argparse.Namespace:
    p = argparse.ArgumentParser()
    module.add_arguments(p)  # type: ignore[attr-defined]
    return p.parse_args(list(argv))


def test_check_against_the_simulated_board(capsys: pytest.CaptureFixture[str]) -> None:
    args = _args(check, "--port", "sim", "--speed", "4", "--pings", "20", "--samples-time", "1")
    assert check.run(args) == EXIT_OK
    out = capsys.readouterr().out
    assert "cart-wheel" in out and "over 20 pings" in out
    assert "lost        0 of 101 samples" in out  # 1 s at a 10 ms tick, both ends included
    assert "output 0 throughout" in out and "result      ok" in out


def test_check_no_such_port() -> None:
    with pytest.raises(UserError, match="no such port") as err:
        check.run(_args(check, "--port", "/dev/ttyNO-SUCH-PORT"))
    assert err.value.exit_code == EXIT_LINK


def test_check_nothing_answers() -> None:
    with pytest.raises(UserError, match="nothing answered"):
        check.run(_args(check, "--port", "loop://"))


def test_check_wrong_protocol_version() -> None:
    # A peer on a real pty that answers every Hello as a device of a newer version would.
    master, slave = os.openpty()

    def peer() -> None:
        dec = FrameDecoder()
        while True:
            try:
                data = os.read(master, 4096)
            except OSError:
                return
            for f in dec.feed(data):
                if f.type == m.Hello.TYPE:
                    os.write(master, m.encode(m.Nak(m.Hello.TYPE, m.NakCode.BAD_VERSION,
                                                    m.PROTOCOL_VERSION + 1.0), f.seq))
                elif f.type == m.Stop.TYPE:
                    os.write(master, m.encode(m.Stopped(), f.seq))

    threading.Thread(target=peer, daemon=True).start()
    try:
        with pytest.raises(UserError, match=f"version {m.PROTOCOL_VERSION}.*version "
                                            f"{m.PROTOCOL_VERSION + 1}"):
            check.run(_args(check, "--port", os.ttyname(slave)))
    finally:
        os.close(slave)
        os.close(master)


def test_rest_stats() -> None:
    rs = check.rest_stats([0.0, 0.05, 0.1, 0.05])
    assert rs.peak_to_peak == pytest.approx(0.1)
    assert rs.resolution == pytest.approx(0.05)
    assert rs.mean == pytest.approx(0.05)
    assert check.rest_stats([1.0, 1.0]).resolution is None


def test_ports_lists_or_says_none(capsys: pytest.CaptureFixture[str]) -> None:
    assert ports.run(_args(ports)) == EXIT_OK
    out = capsys.readouterr().out
    rows = ports.describe_ports()
    if rows:
        assert all(r[0] in out for r in rows)
    else:
        assert "no serial ports found" in out
