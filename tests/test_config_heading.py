"""The "heading" loop of a ``[[loop]]`` plan (autotune.config): its geometry and host tick
parsed, and the errors that name the key."""

from __future__ import annotations

import tomllib

import pytest

from autotune.config import config_from_dict
from autotune.errors import ConfigError

WHEELS = """
[[loop]]
name = "left"
axis = 0
role = "matched"

[[loop]]
name = "right"
axis = 1
role = "matched"
"""

HEADING = """
[[loop]]
name = "heading"
role = "heading"
wheel_radius = 0.05
track_width = 0.30
host_ticks = 5
"""


def cfg_of(text: str):
    return config_from_dict(tomllib.loads(text), "plan.toml")


def test_heading_loop_parsed_after_its_two_wheels():
    cfg = cfg_of(WHEELS + HEADING)
    head = cfg.plan[2]
    assert (head.name, head.role, head.wheel_radius, head.track_width, head.host_ticks) == (
        "heading", "heading", 0.05, 0.30, 5)
    assert head.axis == -1  # no axis of its own: it drives both wheels'
    assert cfg.to_dict()["plan"][2]["host_ticks"] == 5


@pytest.mark.parametrize("text, key, problem", [
    (HEADING + WHEELS, "loop[0].role", "after exactly two matched loops"),
    (WHEELS + HEADING.replace("wheel_radius = 0.05\n", ""), "loop[2].wheel_radius",
     "must be given"),
    (WHEELS + HEADING.replace("0.30", "-0.3"), "loop[2].track_width", "> 0"),
    (WHEELS + HEADING.replace("host_ticks = 5", "host_ticks = 0"), "loop[2].host_ticks",
     "1..1000"),
])
def test_bad_heading_loops_name_the_key(text, key, problem):
    with pytest.raises(ConfigError) as exc:
        cfg_of(text)
    assert key in str(exc.value) and problem in str(exc.value)
