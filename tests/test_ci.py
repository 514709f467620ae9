"""The test suite's own rules: nothing skips in CI for a tool CI could install.

A test that needs a tool asks ``servers.require`` (a skip on a developer's
machine, a failure under ``SEAWALL_REQUIRE_SERVICES=1``), and ``.ci/run``
installs every tool a test asks for, so a green CI run never hides a skipped
check.  Read from the source files, so a new test that skips by hand, or
asks for a tool ``.ci/run`` does not install, fails here.
"""
from __future__ import annotations

import re
from pathlib import Path

TESTS = Path(__file__).resolve().parent
CI = (TESTS.parent / ".ci" / "run").read_text(encoding="utf-8")


def sources() -> dict[str, str]:
    return {p.name: p.read_text(encoding="utf-8") for p in sorted(TESTS.glob("*.py")) if p.name != "test_ci.py"}


def test_no_test_skips_by_hand():
    by_hand = re.compile(r"pytest\.skip\(|pytest\.importorskip\(|mark\.skip(if)?\b")
    offenders = {name: by_hand.findall(text) for name, text in sources().items() if name != "servers.py"}
    assert {name: found for name, found in offenders.items() if found} == {}, \
        "route skips through servers.require, which fails under SEAWALL_REQUIRE_SERVICES=1"


def test_ci_installs_every_tool_a_test_requires():
    asked = set()
    for text in sources().values():
        asked |= set(re.findall(r"""require\(\s*shutil\.which\(["']([\w.-]+)["']\)""", text))
    installed = set(re.findall(r"^need ([\w.-]+) ", CI, re.M))
    assert asked, "no test asks for a tool: the pattern above no longer matches servers.require calls"
    assert asked <= installed, f".ci/run does not install {sorted(asked - installed)}"


def test_ci_runs_the_readme_test_command_with_services_required():
    assert "export SEAWALL_REQUIRE_SERVICES=1" in CI
    assert "pip install -e '.[test]' && pytest" in CI
