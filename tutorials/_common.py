"""Shared pieces of the tutorials: arguments, the training loop, progress lines, tables, plots.

Nothing here is part of the phasorgraph package; it is the plain PyTorch a user would write
around the layers. Every tutorial takes ``--quick`` (a small graph and a few epochs, seconds)
and ``--seed``; plots go to ``tutorials/output/`` when matplotlib is installed.
"""

from __future__ import annotations

import argparse
import math
import os
import time
from pathlib import Path
from typing import Callable, Optional, Sequence

import numpy as np
import torch
import torch.nn.functional as F

# PNG files go here; the smoke tests point PHASORGRAPH_TUTORIAL_OUTPUT at a temporary folder
OUTPUT = Path(os.environ.get("PHASORGRAPH_TUTORIAL_OUTPUT") or Path(__file__).resolve().parent / "output")


# ---------------------------------------------------------------------- arguments
def parse_args(doc: str, argv: Optional[Sequence[str]] = None,
               extra: Optional[Callable[[argparse.ArgumentParser], None]] = None) -> argparse.Namespace:
    """The common command line: --quick, --seed, --threads, --no-plot (``extra`` adds more)."""
    parser = argparse.ArgumentParser(description=doc.strip().splitlines()[0],
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true",
                        help="a small graph and a few epochs (seconds; what the smoke tests run)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the generated data and of the models (default 0)")
    parser.add_argument("--threads", type=int, default=1,
                        help="torch threads (default 1: these graphs are small, and on a busy machine more threads are slower)")
    parser.add_argument("--no-plot", action="store_true", help="do not write PNG files")
    if extra is not None:
        extra(parser)
    args = parser.parse_args(argv)
    torch.set_num_threads(max(1, args.threads))
    torch.manual_seed(args.seed)
    np.random.seed(args.seed)
    return args


def banner(title: str, args: argparse.Namespace) -> None:
    mode = "quick" if args.quick else "full"
    print(f"== {title} ({mode} run, seed {args.seed}, {torch.get_num_threads()} thread(s), torch {torch.__version__})")


# ---------------------------------------------------------------------- small helpers
def count_parameters(model: torch.nn.Module) -> int:
    """Number of trainable scalars (a complex weight stored as real pairs counts twice)."""
    return sum(p.numel() * (2 if p.is_complex() else 1) for p in model.parameters() if p.requires_grad)


def accuracy(logits: torch.Tensor, labels: torch.Tensor) -> float:
    if labels.numel() == 0:
        return float("nan")
    return float((logits.argmax(dim=-1) == labels).float().mean())


def auc(scores, labels) -> float:
    """Area under the ROC curve by the rank formula (Mann-Whitney U), numpy only.

    AUC = (R_pos - n_pos (n_pos + 1) / 2) / (n_pos n_neg), with R_pos the sum of the ranks
    (1-based, ties given their average rank) of the positive scores among all scores
    (Hanley and McNeil, Radiology 1982).
    """
    s = np.asarray(scores, dtype=np.float64).ravel()
    y = np.asarray(labels).ravel().astype(bool)
    n_pos, n_neg = int(y.sum()), int((~y).sum())
    if n_pos == 0 or n_neg == 0:
        return float("nan")
    order = np.argsort(s, kind="mergesort")
    sorted_s = s[order]
    ranks = np.empty(s.size, dtype=np.float64)
    # average ranks over ties, vectorized: each run of equal scores gets the mean of its ranks
    boundaries = np.flatnonzero(np.diff(sorted_s)) + 1
    starts = np.concatenate([[0], boundaries])
    ends = np.concatenate([boundaries, [s.size]])
    run_rank = (starts + 1 + ends) / 2.0  # mean of ranks starts+1 .. ends
    ranks[order] = np.repeat(run_rank, ends - starts)
    return float((ranks[y].sum() - n_pos * (n_pos + 1) / 2.0) / (n_pos * n_neg))


def mean_std(values: Sequence[float], digits: int = 3) -> str:
    v = np.asarray([x for x in values if not math.isnan(x)], dtype=np.float64)
    if v.size == 0:
        return "n/a"
    if v.size == 1:
        return f"{v[0]:.{digits}f}"
    return f"{v.mean():.{digits}f} +- {v.std(ddof=1):.{digits}f}"


def format_table(headers: Sequence[str], rows: Sequence[Sequence[object]], left: int = 1) -> str:
    """A plain-text table, the first ``left`` columns left-aligned, the others right-aligned."""
    cells = [[str(h) for h in headers]] + [[str(c) for c in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(headers))]

    def line(r):
        return "  ".join(c.ljust(w) if i < left else c.rjust(w) for i, (c, w) in enumerate(zip(r, widths)))

    rule = "  ".join("-" * w for w in widths)
    return "\n".join([line(cells[0]), rule] + [line(r) for r in cells[1:]])


def print_table(title: str, headers: Sequence[str], rows: Sequence[Sequence[object]], left: int = 1) -> None:
    print()
    print(title)
    print(format_table(headers, rows, left))


def missing_layer(*names: str) -> Optional[str]:
    """The first of ``names`` that phasorgraph.nn does not provide, or None when all exist."""
    import phasorgraph.nn as pnn

    for name in names:
        if not hasattr(pnn, name):
            return name
    return None


# ---------------------------------------------------------------------- training
def train_classifier(model: torch.nn.Module, logits_fn: Callable[[], torch.Tensor], labels: torch.Tensor,
                     train_idx: torch.Tensor, val_idx: torch.Tensor, test_idx: torch.Tensor, *,
                     epochs: int, lr: float = 0.01, weight_decay: float = 5e-4, eval_every: int = 5,
                     log_every: int = 0, name: str = "", on_eval: Optional[Callable[[int], None]] = None) -> dict:
    """Full-batch training of a node classifier with Adam and cross-entropy.

    ``logits_fn()`` returns the (N, classes) logits of every node. Every ``eval_every`` epochs
    the validation accuracy is measured; the reported test accuracy is the one at the best
    validation accuracy (model selection on validation only). ``log_every > 0`` prints one
    progress line every that many epochs; ``on_eval(epoch)`` is called at each evaluation
    (to record a learned charge, say).

    Returns:
        dict with ``test``, ``val`` (accuracies at the best validation epoch), ``epoch``,
        ``seconds`` (training wall time) and ``history`` (list of (epoch, loss, val)).
    """
    opt = torch.optim.Adam(model.parameters(), lr=lr, weight_decay=weight_decay)
    best = {"val": -1.0, "test": float("nan"), "epoch": 0}
    history = []
    t0 = time.perf_counter()
    for epoch in range(1, epochs + 1):
        model.train()
        opt.zero_grad()
        out = logits_fn()
        loss = F.cross_entropy(out[train_idx], labels[train_idx])
        loss.backward()
        opt.step()
        loss = loss.detach()
        logging = bool(log_every) and (epoch % log_every == 0 or epoch == epochs)
        if epoch % eval_every == 0 or epoch == epochs or logging:
            model.eval()
            with torch.no_grad():
                out = logits_fn()
            val, test = accuracy(out[val_idx], labels[val_idx]), accuracy(out[test_idx], labels[test_idx])
            history.append((epoch, float(loss), val))
            if val > best["val"]:
                best = {"val": val, "test": test, "epoch": epoch}
            if on_eval is not None:
                on_eval(epoch)
        if logging:
            print(f"    {name} epoch {epoch:4d}/{epochs}  loss {float(loss):.3f}  val acc {history[-1][2]:.3f}  "
                  f"{time.perf_counter() - t0:5.1f} s", flush=True)
    best["seconds"] = time.perf_counter() - t0
    best["history"] = history
    return best


# ---------------------------------------------------------------------- plots
def pyplot():
    """matplotlib.pyplot with the file-only Agg backend, or None when matplotlib is missing."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        return None
    return plt


def save_figure(fig, name: str) -> Path:
    OUTPUT.mkdir(parents=True, exist_ok=True)
    path = OUTPUT / name
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    return path


def maybe_plot(args: argparse.Namespace):
    """pyplot when plotting is wanted and possible, else None (with a note)."""
    if args.no_plot:
        return None
    plt = pyplot()
    if plt is None:
        print("(matplotlib is not installed: no PNG written; pip install matplotlib to get the plots)")
    return plt


def machine_line() -> str:
    import platform

    return (f"{platform.machine()} {platform.system()}, {os.cpu_count()} CPUs visible, "
            f"{torch.get_num_threads()} torch thread(s), torch {torch.__version__}, "
            f"{time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}")
