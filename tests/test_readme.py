"""Every python block of README.md runs as written (the README is part of the product)."""
import pathlib
import re

import pytest
import torch

README = pathlib.Path(__file__).resolve().parents[1] / "README.md"
BLOCKS = re.findall(r"```python\n(.*?)```", README.read_text(), flags=re.S)


def test_readme_has_examples():
    assert len(BLOCKS) >= 2


@pytest.mark.parametrize("i", range(len(BLOCKS)))
def test_readme_block_runs(i, capsys):
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        exec(compile(BLOCKS[i], f"README.md block {i}", "exec"), {"__name__": "__readme__"})
    finally:
        torch.set_num_threads(threads)
