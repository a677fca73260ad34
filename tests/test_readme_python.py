"""The README's section "Using sweepgen from Python": its code blocks run, in order, as one notebook."""

import re
from pathlib import Path

import pytest

README = Path(__file__).resolve().parents[1] / "README.md"
SECTION = "## Using sweepgen from Python"


def python_blocks() -> list[str]:
    """The ```python blocks of the section, in order."""
    text = README.read_text(encoding="utf-8")
    start = text.index(SECTION)
    end = text.find("\n## ", start + len(SECTION))
    section = text[start:end if end > 0 else None]
    return re.findall(r"```python\n(.*?)```", section, flags=re.S)


def test_the_section_has_its_examples():
    blocks = python_blocks()
    assert len(blocks) >= 4
    joined = "\n".join(blocks)
    for name in ("sweepgen.plan(", "sweepgen.simulate(", "sweepgen.check(", ".upload(", "instrument_server",
                 "dry_run=True", "force_fraction"):
        assert name in joined


@pytest.mark.slow
def test_the_examples_run_as_one_notebook(capsys):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    namespace: dict = {"__name__": "__readme__"}
    for n, block in enumerate(python_blocks()):
        exec(compile(block, f"README.md python block {n + 1}", "exec"), namespace)
    plt.close("all")
    out = capsys.readouterr().out
    # what the comments in the README promise
    assert "0.6 260 m/s" in out and "<dict> chirp.start_velocity" in out
    assert "True 8000000.0" in out                                  # checked.ok, checked.sample_rate
    captured = namespace["captured"]
    assert len(captured) == 4 and all(0 < c < 1 for c in captured)
    # constant deceleration: the slowing distance (v1² − v2²)/(2 η a_max) scales as 1/η (textbook kinematics)
    slowing = namespace["slowing"]
    assert slowing[0] * 0.55 == pytest.approx(slowing[3] * 0.85, rel=1e-3)
    done = namespace["done"]
    assert done.verified and not done.armed and not namespace["dry"].verified
