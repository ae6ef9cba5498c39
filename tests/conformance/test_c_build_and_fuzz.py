"""The C library's own checks, built with the system C compiler: the examples of SPEC.md byte
for byte, and the decoder fuzz under AddressSanitizer and UBSan (a report fails the run)."""

from __future__ import annotations

import re
import subprocess

from autotune.boardsim import BOARD_DIR, BUILD_DIR

FUZZ_FRAMES = 100_000


def test_spec_vectors(c_build) -> None:
    # Reference: the worked examples of protocol/SPEC.md sections 3.2, 3.3 and 10.
    proc = subprocess.run([str(BUILD_DIR / "spec-vectors")], capture_output=True, text=True,
                          timeout=60)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "ok" in proc.stdout


def test_decoder_fuzz_without_sanitizer_reports(c_build) -> None:
    # -fsanitize=address,undefined -fno-sanitize-recover=all: any report aborts non-zero
    proc = subprocess.run([str(BUILD_DIR / "fuzz-decoder"), "--frames", str(FUZZ_FRAMES),
                           "--seed", "20240613"], capture_output=True, text=True, timeout=300,
                          cwd=BOARD_DIR)
    out = proc.stdout + proc.stderr
    assert proc.returncode == 0, out[-3000:]
    assert "runtime error" not in out and "AddressSanitizer" not in out
    found = re.search(r"fuzz: (\d+) frames fed .*?: (\d+) good, (\d+) CRC errors, (\d+) framing",
                      proc.stdout)
    assert found, proc.stdout
    fed, good, crc, framing = map(int, found.groups())
    assert fed >= FUZZ_FRAMES and good > 0.3 * fed and crc > 0 and framing > 0
    # the board under fuzz has two axes (-DATB_MAX_AXES=2): the per-axis checks ran
    found = re.search(r"(\d+) axes, (\d+) non-zero outputs checked against the watchdog",
                      proc.stdout)
    assert found and int(found.group(1)) == 2 and int(found.group(2)) > 0, proc.stdout
