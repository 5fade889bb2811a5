"""``python -m phasorgraph.scan``: tables in, table + verdict out, PNG and JSON written, errors name file and column."""

from __future__ import annotations

import json
import sys

import numpy as np
import pytest

from phasorgraph.data import directed_block_model
from phasorgraph.scan.__main__ import main

pd = pytest.importorskip("pandas")


@pytest.fixture()
def tables(tmp_path):
    g, y = directed_block_model([40, 40, 40], 0.07, [[0.5, 0.85, 0.85], [0.15, 0.5, 0.85], [0.15, 0.15, 0.5]],
                                seed=1)
    names = np.array([f"depot-{i:03d}" for i in range(g.num_nodes)])
    edges = pd.DataFrame({"from": names[g.source.numpy()], "to": names[g.target.numpy()],
                          "volume": np.random.default_rng(0).uniform(1, 50, g.num_edges)})
    tiers = np.array(["terminal", "hub", "outlet"])[y.numpy()]
    nodes = pd.DataFrame({"depot": names, "tier": tiers, "area": np.random.default_rng(1).normal(size=g.num_nodes)})
    nodes.loc[::7, "tier"] = None  # unlabeled depots
    edges_path, nodes_path = tmp_path / "lanes.csv", tmp_path / "depots.csv"
    edges.to_csv(edges_path, index=False)
    nodes.to_csv(nodes_path, index=False)
    return str(edges_path), str(nodes_path), tmp_path


def _args(edges, nodes, out, **override):
    args = {"--source": "from", "--target": "to", "--weight": "volume", "--labels": nodes, "--id": "depot",
            "--label": "tier", "--features": "area", "--out": str(out), "--charges": "0,0.25",
            "--permutations": "3", "--quiet": None}
    args.update(override)
    flat = [edges]
    for k, v in args.items():
        if v is False:
            continue
        flat += [k] if v is None else [k, v]
    return flat


def test_command_prints_the_table_and_writes_png_and_json(tables, capsys):
    edges, nodes, tmp = tables
    assert main(_args(edges, nodes, tmp / "out")) == 0
    out = capsys.readouterr().out
    assert "charge scan (classification" in out and "best charge" in out and "(3 classes)" in out
    record = json.loads((tmp / "out" / "charge_scan.json").read_text())
    assert record["best_charge"] == 0.25 and len(record["rows"]) == 2
    assert record["inputs"]["classes"] == ["hub", "outlet", "terminal"]
    # with --weight the defaults are the unit-free ones measured in bench/phase_weights.py
    assert record["inputs"]["weight_transform"] == "log1p" and record["inputs"]["phase"] == "relative"
    assert (tmp / "out" / "charge_scan.png").read_bytes()[:4] == b"\x89PNG"


def test_command_runs_as_a_module(tables, monkeypatch, capsys):
    # `python -m phasorgraph.scan` runs phasorgraph/scan/__main__.py as __main__ (runpy, as the
    # interpreter does; in-process to spare a second interpreter start)
    import runpy

    edges, nodes, tmp = tables
    monkeypatch.setattr(sys, "argv", ["phasorgraph.scan"] + _args(edges, nodes, tmp / "m"))
    monkeypatch.delitem(sys.modules, "phasorgraph.scan.__main__", raising=False)  # imported above for main()
    with pytest.raises(SystemExit) as done:
        runpy.run_module("phasorgraph.scan", run_name="__main__", alter_sys=True)
    assert done.value.code == 0
    assert "direction" in capsys.readouterr().out and (tmp / "m" / "charge_scan.json").exists()


@pytest.mark.parametrize("override, words", [
    ({"--source": "origin"}, ["lanes.csv", "'origin'"]),
    ({"--label": "level"}, ["depots.csv", "'level'"]),
    ({"--features": "area,height"}, ["depots.csv", "'height'"]),
    ({"--id": "area"}, ["depots.csv", "'area'"]),  # ids that are not nodes of the graph
])
def test_command_errors_name_the_file_and_the_column(tables, capsys, override, words):
    edges, nodes, tmp = tables
    assert main(_args(edges, nodes, tmp / "e", **override)) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ")
    for w in words:
        assert w in err


def test_command_refuses_an_empty_label_set(tables, capsys):
    edges, nodes, tmp = tables
    frame = pd.read_csv(nodes)
    frame["tier"] = None
    frame.to_csv(nodes, index=False)
    assert main(_args(edges, nodes, tmp / "e")) == 2
    err = capsys.readouterr().err
    assert "depots.csv" in err and "label column 'tier' holds no label" in err
