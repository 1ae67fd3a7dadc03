"""The README's Python example runs as written (its first ```python block under "## Python")."""

import re

from conftest import REPO


def test_readme_example_runs(capsys):
    text = (REPO / "README.md").read_text()
    section = text.split("\n## Python\n", 1)[1].split("\n## ", 1)[0]
    code = re.search(r"```python\n(.*?)```", section, re.S).group(1)
    exec(compile(code, "README.md (Python example)", "exec"), {})
    out = capsys.readouterr().out.splitlines()
    # The example moves a ball by 3 voxels along i: the field recovers it, Dice reaches 1.
    assert out[0].startswith("<sinew.Registration field (64, 56, 48, 3) voxel")
    assert [abs(float(v)) for v in out[1].strip("[]").split()] == [3.0, 0.0, 0.0]
    assert float(out[2]) > 0.95
