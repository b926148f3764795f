"""The shipped Prometheus alerting rules, checked and unit-tested by Prometheus's own promtool."""

import subprocess
from pathlib import Path

from conftest import required_tool

RULES = Path(__file__).parent.parent / "deploy" / "prometheus"


def test_rules_are_valid():
    proc = subprocess.run([required_tool("promtool"), "check", "rules", str(RULES / "shiftsieve-rules.yml")],
                          capture_output=True)
    assert proc.returncode == 0, proc.stdout + proc.stderr


def test_rules_unit_tests_pass():
    proc = subprocess.run([required_tool("promtool"), "test", "rules", "shiftsieve-rules.test.yml"], cwd=RULES,
                          capture_output=True)
    assert proc.returncode == 0, proc.stdout + proc.stderr


def test_rules_use_only_series_the_exporter_defines():
    """Every shiftsieve_* name in the rules is one the exporter registers (or a derived sample of one)."""
    import re

    from shiftsieve.stream.exporter import Exporter
    exported = {m.name for m in Exporter().registry.collect()}
    used = set(re.findall(r"\bshiftsieve_[a-z_]+", (RULES / "shiftsieve-rules.yml").read_text()))
    # prometheus-client reports counters without their _total suffix in collect().
    assert {u.removesuffix("_total") for u in used} <= exported
