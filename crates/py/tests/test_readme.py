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
    # The true shift is (3, 0, 0) voxels by construction; a regularised field gets within a
    # quarter voxel of it at the centre of the ball.
    u = [float(v) for v in out[1].strip("[]").split()]
    assert max(abs(a - b) for a, b in zip(u, [3.0, 0.0, 0.0])) <= 0.25, u
    assert float(out[2]) > 0.95
