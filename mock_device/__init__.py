"""Simulated robot controller board, run as its own process: ``python -m mock_device``.

Modules: plant (LTI plant with dead time, actuator, sensor; pure, also used by tests to make
data), config (plant file), faults (fault injection), device (tick and message state machine, no
I/O), server (pty / TCP loop, --speed and --baud pacing). Shares only protocol/ with the host.
"""
