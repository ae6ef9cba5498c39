"""The ``[[loop]]`` plan of the run configuration (autotune.config): parsing, defaults taken
from the shared sections, and errors that name the key."""

from __future__ import annotations

import tomllib

import pytest

from autotune.config import Config, LoopConfig, config_from_dict, load_config, with_overrides
from autotune.errors import ConfigError

DRIVE_BASE = """
[safety]
output_limit = 40.0
pv_window = 6.0

[[loop]]
name = "left"
axis = 0
role = "matched"

[[loop]]
name = "right"
axis = 1
role = "matched"
sign = -1
[loop.limits]
output_limit = 35.0
"""


def plan_cfg(text: str) -> Config:
    return config_from_dict(tomllib.loads(text), "plan.toml")


def test_plan_parsed_in_order():
    cfg = plan_cfg(DRIVE_BASE)
    assert [(lp.name, lp.axis, lp.role) for lp in cfg.plan] == [
        ("left", 0, "matched"), ("right", 1, "matched")]
    assert cfg.plan[1].limits == (("output_limit", 35.0),)
    assert cfg.plan[0].sign is None and cfg.plan[1].sign == -1


def test_each_loop_runs_with_the_shared_sections_and_its_own_limits():
    cfg = plan_cfg(DRIVE_BASE)
    left, right = (cfg.for_loop(lp) for lp in cfg.plan)
    assert left.connection.axis == 0 and right.connection.axis == 1
    assert left.connection.sign == 1 and right.connection.sign == -1
    assert left.safety.output_limit == 40.0 and right.safety.output_limit == 35.0
    assert left.safety.pv_window == right.safety.pv_window == 6.0  # shared [safety]
    # the defaults are the schema's, once: a key no table sets is the dataclass default
    assert right.safety.watchdog == Config().safety.watchdog
    assert right.relay == Config().relay
    assert left.plan == () and right.plan == ()  # each loop runs as a one-loop job


def test_loop_defaults():
    cfg = plan_cfg('[[loop]]\nname = "wheel"\naxis = 2\n')
    (loop,) = cfg.plan
    assert loop == LoopConfig(name="wheel", axis=2)
    assert loop.role == "single" and loop.sign is None and loop.limits == ()


def test_no_plan_keeps_the_one_loop_config_and_header():
    cfg = config_from_dict({}, "x.toml")
    assert cfg.plan == ()
    assert "plan" not in cfg.to_dict()  # a one-loop session header as before


def test_plan_in_the_header_is_plain_data():
    d = plan_cfg(DRIVE_BASE).to_dict()
    assert d["plan"][1] == {"name": "right", "axis": 1, "role": "matched", "sign": -1,
                            "limits": {"output_limit": 35.0}}


def test_plan_from_a_file(tmp_path):
    path = tmp_path / "base.toml"
    path.write_text(DRIVE_BASE, encoding="utf-8")
    cfg = load_config(path)
    assert len(cfg.plan) == 2 and cfg.source == str(path)


def test_command_line_overrides_keep_the_plan():
    cfg = with_overrides(plan_cfg(DRIVE_BASE), {"relay.target_amplitude": 0.4})
    assert len(cfg.plan) == 2
    assert cfg.for_loop(cfg.plan[1]).relay.target_amplitude == 0.4


_LOOP = '[[loop]]\nname = "left"\naxis = 0\n'


@pytest.mark.parametrize(
    ("text", "key", "problem"),
    [
        ('[[loop]]\naxis = 0\n', "loop[0].name", "must be given"),
        ('[[loop]]\nname = "a"\n', "loop[0].axis", "must be given"),
        (_LOOP + 'gain = 3\n', "loop[0].gain", "unknown key"),
        ('[[loop]]\nname = "a"\naxis = "one"\n', "loop[0].axis", "expected an integer"),
        (_LOOP + 'role = "boss"\n', "loop[0].role", "expected 'single' or 'matched'"),
        ('[[loop]]\nname = "a b"\naxis = 0\n', "loop[0].name", "letters, digits"),
        ('[[loop]]\nname = ""\naxis = 0\n', "loop[0].name", "letters, digits"),
        ('[[loop]]\nname = "../x"\naxis = 0\n', "loop[0].name", "letters, digits"),
        (_LOOP + '[[loop]]\nname = "LEFT"\naxis = 1\n', "loop[1].name", "is taken by loop[0]"),
        (_LOOP + '[[loop]]\nname = "right"\naxis = 0\n', "loop[1].axis", "one loop an axis"),
        ('[[loop]]\nname = "a"\naxis = 256\n', "loop[0].axis", "must be 0..255"),
        (_LOOP + 'sign = 2\n', "loop[0].sign", "must be +1 or -1"),
        (_LOOP + 'role = "matched"\n', "loop[0].role", "needs another matched loop"),
        (_LOOP + '[loop.limits]\npv_windw = 3.0\n', "loop[0].limits.pv_windw", "unknown key"),
        (_LOOP + '[loop.limits]\noutput_limit = "x"\n', "loop[0].limits.output_limit",
         "expected a number"),
        (_LOOP + 'limits = 3\n', "loop[0].limits", "expected a [loop.limits] table"),
        ('loop = 3\n', "loop", "expected [[loop]] tables"),
        ('[loop]\nname = "a"\n', "loop", "expected [[loop]] tables"),
        ("[connection]\naxis = 1\n" + _LOOP, "connection.axis", "not used with a [[loop]] plan"),
        ("".join(f'[[loop]]\nname = "l{i}"\naxis = {i}\n' for i in range(9)), "loop",
         "at most 8 loops"),
        # a loop's limits are checked as the job will run them (the loop is named)
        (_LOOP + '[loop.limits]\noutput_limit = -1.0\n', "safety.output_limit", "must be > 0"),
    ],
)
def test_bad_plans_name_the_key(text, key, problem):
    with pytest.raises(ConfigError) as info:
        plan_cfg(text)
    assert info.value.key == key
    assert problem in info.value.problem


def test_a_loops_limits_error_names_the_loop():
    text = _LOOP + '[loop.limits]\npv_window = 0.5\n'  # below twice the target amplitude
    with pytest.raises(ConfigError) as info:
        plan_cfg(text)
    assert info.value.path == "plan.toml, loop 'left'"
    assert info.value.key == "relay.target_amplitude"
