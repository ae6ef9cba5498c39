"""One module per verb of the `autotune` command: HELP, add_arguments(parser), run(args) -> int."""

VERBS = ("ports", "check", "tune", "step", "analyze", "compare", "demo")
