"""Run the README's examples: every fenced block marked ```python test``` is executed as
written, in a fresh namespace and an empty working folder, so the documented calls (the
pandas and polars ones included) stay true.  Each example asserts its own results.

The examples use invented data (the fictional HBOX venue); their assertions are about the
documented behaviour (statuses, output columns), not about reference values.
"""

import re
from pathlib import Path

import pytest

README = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
BLOCKS = re.findall(r"^```python test\n(.*?)^```\s*$", README, flags=re.M | re.S)


def test_readme_has_the_tested_examples():
    # the pandas and polars examples the README promises, and the kernel one
    assert len(BLOCKS) >= 5
    for library in ("import pandas", "import polars", "from volsweep.kernel import"):
        assert any(library in b for b in BLOCKS), library


@pytest.mark.parametrize("code", BLOCKS, ids=[f"block{i}" for i in range(len(BLOCKS))])
def test_readme_example_runs(code, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    exec(compile(code, "README.md", "exec"), {"__name__": "readme_example"})
