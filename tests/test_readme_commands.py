"""README's two commands: the test command is exactly what CI runs (issue 7 asks for this check)."""

import os
import re

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def readme_commands():
    text = open(os.path.join(ROOT, "README.md")).read()
    section = text.split("## Two commands", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```\n(.+?)\n```", section, flags=re.S)


def test_readme_has_two_commands_and_ci_runs_the_test_one():
    commands = readme_commands()
    assert len(commands) == 2
    demo, tests = (c.strip() for c in commands)
    assert "isoclay demo" in demo and demo.startswith("bash solver/setup.sh")
    ci = open(os.path.join(ROOT, ".ci", "run")).read().strip().splitlines()
    assert ci[-1].strip() == tests


def test_setup_pins_the_cpu_torch_build():
    # a plain "torch" requirement pulls a multi-GB CUDA build on this kind of machine
    setup = open(os.path.join(ROOT, "solver", "setup.sh")).read()
    assert '"torch==2.13.0"' in setup
    assert setup.index("torch==2.13.0") < setup.index('-e ".[test]"')
