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


def _api_table_names() -> set:
    """Names in the first column of the README's API tables: the leading identifier of each
    backticked span (``DirectedGraph.from_edges(...)`` gives DirectedGraph; spans that start
    with a dot are methods or attributes of the name before them, and command lines such as
    ``python -m ...``, are skipped)."""
    text = README.read_text()
    section = text.split("\n## API\n", 1)[1].split("\n## ", 1)[0]
    names = set()
    for line in section.splitlines():
        if not line.startswith("| `"):
            continue
        first_cell = line.split("|")[1]
        for span in re.findall(r"`([^`]*)`", first_cell):
            match = re.match(r"[A-Za-z_][A-Za-z0-9_]*(?=$|[(.:\[])", span)
            if match:   # a name, a call or an attribute path (not a shell command line)
                names.add(match.group(0))
    return names


def test_readme_api_table_lists_exactly_the_exported_names():
    # the source of truth is each package's __all__; the README table must match it
    import phasorgraph
    from phasorgraph import data, nn

    exported = (set(phasorgraph.__all__) - {"__version__"}) | set(nn.__all__) | set(data.__all__)
    listed = _api_table_names()
    assert sorted(exported - listed) == [], "exported but missing from the README API table"
    assert sorted(listed - exported) == [], "in the README API table but not exported"
