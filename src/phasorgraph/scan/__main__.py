"""``python -m phasorgraph.scan``: the charge scan on an edge table and a label table.

Usage::

    python -m phasorgraph.scan EDGES.csv --source COL --target COL [--weight COL]
        --labels LABELS.csv --id COL --label COL [--features COLS] [--out DIR]
        [--weight-transform log1p|rank|none] [--phase difference|sign|relative]

Reads the edges (one row per edge, ids of any kind) and a node table with the labels (and,
with ``--features a,b``, numeric node features), runs :func:`phasorgraph.scan_charges`,
prints the table and the verdict, and writes ``charge_scan.png`` and ``charge_scan.json``
into ``--out`` (default: the current folder). With ``--weight``, each pair's summed weight
is taken through ``log1p`` and the phase is "relative" unless ``--weight-transform`` /
``--phase`` say otherwise (the unit-free defaults measured best on heavy-tailed amounts in
bench/phase_weights.py). Exit status 0 on success, 2 on bad input (the
message names the file and the column).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from typing import Optional, Sequence

import numpy as np
import torch

from ..errors import GraphInputError
from ..graph import DirectedGraph
from ..tables import node_features, node_labels
from .charges import scan_charges

__all__ = ["main"]


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="python -m phasorgraph.scan",
        description="Does edge direction help predict a node label? Scans the magnetic charge q and "
                    "compares every q with q = 0 (direction ignored) by cross-validation, with a "
                    "direction-permutation test.")
    p.add_argument("edges", help="edge table: CSV, TSV or Parquet file, one row per edge (source -> target)")
    p.add_argument("--source", required=True, help="column of the edge table holding the source node id")
    p.add_argument("--target", required=True, help="column of the edge table holding the target node id")
    p.add_argument("--weight", default=None, help="column of non-negative edge weights (default: every edge 1)")
    p.add_argument("--labels", required=True, help="node table (CSV, TSV or Parquet) with an id and a label column")
    p.add_argument("--id", required=True, help="column of the node table holding the node id")
    p.add_argument("--label", required=True, help="column of the node table holding the label (empty = unlabeled)")
    p.add_argument("--features", default=None,
                   help="comma-separated numeric columns of the node table to use as node features "
                        "(default: none; the scan always adds a column of ones)")
    p.add_argument("--regression", action="store_true",
                   help="the label is a number to predict (ridge regression, R^2) rather than a class")
    p.add_argument("--out", default=".", help="folder for charge_scan.png and charge_scan.json (default: .)")
    p.add_argument("--weight-transform", choices=("log1p", "rank", "none"), default=None,
                   help='transform of each pair\'s summed weight (default "log1p" with --weight: heavy-tailed '
                        'amounts otherwise drown the structure, see bench/phase_weights.py)')
    p.add_argument("--phase", choices=("difference", "sign", "relative"), default=None,
                   help='magnetic phase (default "relative" with --weight, which no unit of the weights can '
                        'wrap, else "difference")')
    p.add_argument("--charges", default=None, help="comma-separated charges in [0, 0.5] (default: 0 to 0.25)")
    p.add_argument("--order", type=int, default=4, help="Chebyshev order (default 4)")
    p.add_argument("--folds", type=int, default=5, help="cross-validation folds (default 5)")
    p.add_argument("--repeats", type=int, default=2, help="repeats of the fold split (default 2)")
    p.add_argument("--permutations", type=int, default=19, help="randomly oriented copies for the p-value (default 19)")
    p.add_argument("--seed", type=int, default=0, help="seed of the folds and permutations (default 0)")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    return p


def _split(text: Optional[str]) -> Optional[list]:
    if text is None:
        return None
    return [t.strip() for t in text.split(",") if t.strip()]


def _run(args) -> int:
    edges_file, labels_file = args.edges, args.labels
    for role, path in (("edges", edges_file), ("--labels", labels_file)):
        if not os.path.isfile(path):
            raise GraphInputError(f"{role}: no file at {path!r}")
    try:
        transform = args.weight_transform or ("log1p" if args.weight else "none")
        graph = DirectedGraph.from_table(edges_file, source=args.source, target=args.target, weight=args.weight,
                                         weight_transform=None if transform == "none" else transform)
    except GraphInputError as err:
        raise GraphInputError(f"{edges_file}: {err}") from None
    try:
        if args.regression:
            aligned = node_features(graph, labels_file, id=args.id, columns=[args.label], dtype=torch.float64)
            y = aligned.values[:, 0].clone()
            y[~aligned.present] = float("nan")
            labelled = int(torch.isfinite(y).sum())
            classes = None
        else:
            aligned = node_labels(graph, labels_file, id=args.id, label=args.label)
            y = aligned.labels
            labelled = int((y >= 0).sum())
            classes = aligned.classes
        columns = _split(args.features) or []
        x = torch.zeros(graph.num_nodes, 0)
        if columns:
            feats = node_features(graph, labels_file, id=args.id, columns=columns, dtype=torch.float64)
            values = feats.values.clone()
            for j, c in enumerate(columns):
                bad = ~torch.isfinite(values[feats.present, j])
                if bool(bad.any()):
                    raise GraphInputError(
                        f"features column {c!r} has {int(bad.sum())} missing or non-finite values; fill or "
                        f"drop them (the scan needs finite features)")
            if not bool(feats.present.all()):
                # nodes without a row: features 0 and an indicator column, so absence stays visible
                values = torch.cat([values, (~feats.present).to(values.dtype)[:, None]], dim=1)
            x = values
    except GraphInputError as err:
        raise GraphInputError(f"{labels_file}: {err}") from None
    if labelled == 0:
        raise GraphInputError(f"{labels_file}: label column {args.label!r} holds no label for any node of the "
                              f"graph in {edges_file} (check --id and --label)")
    phase = args.phase or ("relative" if args.weight else "difference")
    charges = None if args.charges is None else [float(q) for q in _split(args.charges)]
    try:
        result = scan_charges(graph, x, y, charges=charges, order=args.order, folds=args.folds, repeats=args.repeats,
                              permutations=args.permutations, phase=phase, seed=args.seed,
                              progress=False if args.quiet else None)
    except GraphInputError as err:
        raise GraphInputError(f"{labels_file} (label column {args.label!r}): {err}") from None
    print(f"graph: {graph.num_nodes} nodes, {graph.num_edges} edges from {edges_file}; "
          f"{labelled} labelled nodes from {labels_file}"
          + ("" if classes is None else f" ({len(classes)} classes)"))
    print(result)
    os.makedirs(args.out, exist_ok=True)
    record = result.to_dict()
    record["inputs"] = {"edges": edges_file, "labels": labels_file, "source": args.source, "target": args.target,
                        "weight": args.weight, "weight_transform": transform, "phase": phase, "id": args.id, "label": args.label, "features": columns,
                        "classes": None if classes is None else [str(c) for c in np.asarray(classes).tolist()]}
    json_path = os.path.join(args.out, "charge_scan.json")
    with open(json_path, "w") as fh:
        json.dump(record, fh, indent=1)
    png_path = os.path.join(args.out, "charge_scan.png")
    try:
        result.plot(png_path)
    except ImportError:
        png_path = None
    print(f"wrote {json_path}" + (f" and {png_path}" if png_path else " (no PNG: matplotlib is not installed)"))
    return 0


def main(argv: Optional[Sequence[str]] = None) -> int:
    """Run the command; returns the exit status (0 success, 2 bad input)."""
    args = _parser().parse_args(argv)
    try:
        return _run(args)
    except GraphInputError as err:
        print(f"error: {err}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
