"""The bundled incidents' events, byte for byte, against files recorded before a refactor.

A regression guard, not a correctness claim (correctness against the labels is in
test_demo_incidents.py and against ASD in test_real_data.py): code that only moves must not
change what an on-call engineer receives.  When a change is *meant* to alter detection,
regenerate the files with ``python tests/test_golden_events.py`` and say why in the commit.
"""

from pathlib import Path

import pytest

from shiftsieve.stream.config import load_config
from shiftsieve.stream.demo import scenarios
from shiftsieve.stream.replay import replay

GOLDEN = Path(__file__).parent / "data" / "golden"
NAMES = ["surge", "single_shift", "multi_shift", "ramp"]


def record(name: str, path: Path) -> None:
    replay(scenarios()[name], load_config(environ={}), events_path=str(path), progress=False)


@pytest.mark.parametrize("name", NAMES)
def test_bundled_events_are_unchanged(name, tmp_path):
    out = tmp_path / f"{name}.events.jsonl"
    record(name, out)
    assert out.read_bytes() == (GOLDEN / f"{name}.events.jsonl").read_bytes()


if __name__ == "__main__":
    for name in NAMES:
        record(name, GOLDEN / f"{name}.events.jsonl")
