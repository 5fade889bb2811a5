"""The README's usage example runs as written (a documentation check; no outside reference)."""

import pathlib
import re

import torch

README = pathlib.Path(__file__).resolve().parents[1] / "README.md"


def test_readme_example_runs_and_reaches_the_charge():
    text = README.read_text()
    blocks = re.findall(r"```python\n(.*?)```", text, flags=re.S)
    assert blocks, "README.md has no python example"
    namespace: dict = {"print": lambda *a, **k: None}
    exec(compile(blocks[0], "README.md", "exec"), namespace)
    logits, layer = namespace["logits"], namespace["layer"]
    assert logits.shape == (4, 3) and torch.isfinite(logits).all()
    logits.sum().backward()
    assert layer.charge_logit.grad is not None and torch.isfinite(layer.charge_logit.grad).all()
