r"""Tables in: edge tables with any hashable node ids, and node tables aligned to a graph.

A *table* is any of

* a pandas ``DataFrame``;
* a pyarrow ``Table``;
* a dict (any mapping) of equally long 1-D columns (lists, numpy arrays, torch tensors);
* a path (``str`` or ``os.PathLike``) to a CSV file (``.csv``, ``.csv.gz``, ``.tsv``) or a
  Parquet file (``.parquet``, ``.pq``).

pandas and pyarrow are optional (``pip install "phasorgraph[tables]"``) and imported only when a
DataFrame, an Arrow table or a file is read; dicts of numpy columns need neither.

Node ids may be any hashable values (strings, integers, ...). :func:`graph_from_table` numbers
the nodes in the order their ids first appear, reading the table row by row, source before
target (or in the order of ``nodes=`` when given), and keeps the ids as
``graph.node_names``. :func:`node_features` and :func:`node_labels` line a node table up with
that order. Every helper of :class:`~phasorgraph.DirectedGraph` that returns a new graph
(``permute``, ``locality_order``, ``reverse``, ``symmetrized``, ``subgraph_edges``, hence the
``train_graph`` of a link split) and :class:`~phasorgraph.data.GraphBatch` carry the names along.

Where the rows describe people (payments between persons, messages, contacts), the graph and
whatever is learned from it describe them too: keep such tables as protected as the raw data.
"""

from __future__ import annotations

import importlib
import numbers
import os
from typing import Any, Callable, Mapping, NamedTuple, Optional, Sequence

import numpy as np
import torch

from .errors import GraphInputError

__all__ = ["graph_from_table", "node_features", "node_labels", "NodeFeatures", "NodeLabels", "WEIGHT_TRANSFORMS"]

WEIGHT_TRANSFORMS = ("log1p", "rank")
_CSV_SUFFIXES = (".csv", ".csv.gz", ".tsv", ".tsv.gz", ".txt")
_PARQUET_SUFFIXES = (".parquet", ".pq")
_SHOW = 5  # how many offending ids a message names


def _show(value) -> str:
    """repr of a value for a message, numpy scalars as plain Python values."""
    return repr(value.item() if isinstance(value, np.generic) else value)


# ---------------------------------------------------------------------- optional imports
def _optional(module: str, package: str, why: str):
    """Import an optional dependency of the ``tables`` extra, or say how to install it."""
    try:
        return importlib.import_module(module)
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise GraphInputError(
            f"{why} needs {package}, which is not installed; install the optional extra: "
            f'pip install "phasorgraph[tables]"'
        ) from exc


def _has_pandas() -> bool:
    try:
        import pandas  # noqa: F401
    except ImportError:  # pragma: no cover - depends on the environment
        return False
    return True


# ---------------------------------------------------------------------- reading columns
def _is_dataframe(table) -> bool:
    return type(table).__module__.split(".")[0] == "pandas" and hasattr(table, "columns") and hasattr(table, "iloc")


def _is_arrow_table(table) -> bool:
    return type(table).__module__.split(".")[0] == "pyarrow" and hasattr(table, "column_names")


def _describe(table) -> str:
    if isinstance(table, (str, os.PathLike)):
        return f"file {os.fspath(table)!r}"
    return type(table).__name__


def _column_names(table) -> list:
    if _is_dataframe(table):
        return list(table.columns)
    if _is_arrow_table(table):
        return list(table.column_names)
    return list(table.keys())


def _missing_column(table, role: str, column, names: Sequence) -> GraphInputError:
    shown = ", ".join(repr(c) for c in list(names)[:20]) + (", ..." if len(names) > 20 else "")
    return GraphInputError(
        f"{role} column {column!r} is not in the table ({_describe(table)}); its columns are [{shown}]"
    )


def _read_file(path, wanted: Optional[list]):
    """Read a CSV or Parquet file into a DataFrame or an Arrow table (only the wanted columns)."""
    text = os.fspath(path)
    low = text.lower()
    if not os.path.isfile(text):
        raise GraphInputError(f"table must be a table or the path of an existing file; no file at {text!r}")
    if low.endswith(_PARQUET_SUFFIXES):
        pq = _optional("pyarrow.parquet", "pyarrow", f"reading the Parquet file {text!r}")
        try:
            schema_names = list(pq.read_schema(text).names)
            keep = None if wanted is None else [c for c in wanted if c in schema_names]
            return pq.read_table(text, columns=keep), schema_names
        except GraphInputError:
            raise
        except Exception as exc:
            raise GraphInputError(f"table: could not read the Parquet file {text!r}: {exc}") from exc
    if low.endswith(_CSV_SUFFIXES):
        pd = _optional("pandas", "pandas", f"reading the CSV file {text!r}")
        sep = "\t" if ".tsv" in low else ","
        try:
            header = list(pd.read_csv(text, sep=sep, nrows=0).columns)
            keep = None if wanted is None else [c for c in wanted if c in header]
            return pd.read_csv(text, sep=sep, usecols=keep), header
        except Exception as exc:
            raise GraphInputError(f"table: could not read the CSV file {text!r}: {exc}") from exc
    raise GraphInputError(
        f"table: cannot tell the format of {text!r} from its name; accepted file endings are "
        f"{_CSV_SUFFIXES + _PARQUET_SUFFIXES}, or pass a DataFrame, an Arrow table or a dict of columns"
    )


def _open(table: Any, wanted: Optional[list]):
    """(table object, its column names); a path is read (only the ``wanted`` columns, None: all)."""
    if isinstance(table, (str, os.PathLike)):
        return _read_file(table, wanted)
    if _is_dataframe(table) or _is_arrow_table(table) or isinstance(table, Mapping):
        return table, _column_names(table)
    raise GraphInputError(
        f"table must be a pandas DataFrame, a pyarrow Table, a dict of columns, or the path of a "
        f"CSV or Parquet file; got {type(table).__name__}"
    )


def _to_numpy(col) -> np.ndarray:
    """One column as a 1-D numpy array (object arrays for strings and for nullable columns)."""
    if isinstance(col, torch.Tensor):
        return col.detach().cpu().numpy()
    module = type(col).__module__.split(".")[0]
    if module == "pyarrow":
        import pyarrow as pa

        if pa.types.is_dictionary(col.type):
            col = col.cast(col.type.value_type)
        return np.asarray(col.to_numpy(zero_copy_only=False) if isinstance(col, pa.Array) else col.to_numpy())
    if module == "pandas":
        return col.to_numpy()
    try:
        arr = np.asarray(col)
    except (ValueError, TypeError):  # ragged entries (tuples of different lengths): one value each
        return np.fromiter(col, dtype=object, count=len(col))
    if isinstance(col, (list, tuple)) and (
            arr.ndim != 1 or (arr.dtype.kind in "US" and not all(isinstance(v, (str, bytes)) for v in col))):
        # tuples as ids, or mixed ids (numpy would turn 1 and "a" into "1" and "a"): keep each entry
        arr = np.fromiter(col, dtype=object, count=len(col))
    return arr


def _check_column_name(role: str, column) -> None:
    """A column name is a string or another hashable key (an array or list is refused, not compared)."""
    try:
        hash(column)
    except TypeError:
        raise GraphInputError(
            f"{role} must be a column name (a string or other hashable key); got {type(column).__name__} "
            f"{str(column)[:60]}"
        ) from None


def _read_columns(table: Any, roles: Mapping[str, Any]) -> tuple[dict, int]:
    """The columns named in ``roles`` ({role: column name}) as numpy arrays, and the row count.

    Raises GraphInputError naming the role and the column when a column is absent.
    """
    for role, column in roles.items():
        _check_column_name(role, column)
    source = table
    table, names = _open(table, [c for c in roles.values() if c is not None])
    out = {}
    for role, column in roles.items():
        if column is None:
            continue
        if column not in names:
            raise _missing_column(source, role, column, names)
        if _is_dataframe(table):
            col = table[column]
            if getattr(col, "ndim", 1) != 1:
                raise GraphInputError(f"{role} column {column!r} must be one column; the table has it more than once")
            arr = _to_numpy(col)
        elif _is_arrow_table(table):
            arr = _to_numpy(table.column(column))
        else:
            arr = _to_numpy(table[column])
        if arr.ndim != 1:
            raise GraphInputError(f"{role} column {column!r} must be 1-D; got shape {arr.shape}")
        out[column] = arr
    lengths = {c: a.shape[0] for c, a in out.items()}
    if len(set(lengths.values())) > 1:
        raise GraphInputError(f"table columns must all have the same length; got lengths {lengths}")
    rows = next(iter(lengths.values())) if lengths else 0
    return out, rows


# ---------------------------------------------------------------------- values
def _missing(arr: np.ndarray) -> np.ndarray:
    """Boolean mask of missing entries: NaN, None, NaT, pandas NA."""
    kind = arr.dtype.kind
    if kind in "fc":
        return np.isnan(arr)
    if kind in "mM":
        return np.isnat(arr)
    if kind == "O":
        if _has_pandas():
            import pandas as pd

            return np.asarray(pd.isna(arr), dtype=bool)
        return np.fromiter((v is None or v != v for v in arr), dtype=bool, count=arr.size)  # pragma: no cover
    return np.zeros(arr.shape, dtype=bool)


def _first_position(mask: np.ndarray) -> int:
    return int(np.flatnonzero(mask)[0])


def _check_ids(role: str, column, arr: np.ndarray) -> np.ndarray:
    miss = _missing(arr)
    if miss.any():
        k = _first_position(miss)
        raise GraphInputError(
            f"{role} column {column!r} has a missing id at row {k} (rows counted from 0; "
            f"{int(miss.sum())} missing in all); every row needs an id"
        )
    return arr


def _as_float(role: str, column, arr: np.ndarray, *, allow_missing: bool) -> np.ndarray:
    """A numeric column as float64; missing entries become NaN (refused unless allow_missing)."""
    if arr.dtype.kind in "iufb":
        out = arr.astype(np.float64)
    elif arr.dtype.kind == "O":
        miss = _missing(arr)
        out = np.full(arr.shape, np.nan)
        try:
            out[~miss] = arr[~miss].astype(np.float64)
        except (TypeError, ValueError):
            bad = next(v for v in arr[~miss] if not isinstance(v, (numbers.Real, np.bool_)))
            raise GraphInputError(
                f"{role} column {column!r} must hold numbers; got the value {_show(bad)}"
            ) from None
    else:
        raise GraphInputError(f"{role} column {column!r} must hold numbers; got dtype {arr.dtype}")
    if not allow_missing:
        bad = ~np.isfinite(out)
        if bad.any():
            k = _first_position(bad)
            raise GraphInputError(
                f"{role} column {column!r} must be finite; row {k} (rows counted from 0) holds {_show(arr[k])}"
            )
    return out


def _factorize(values: np.ndarray, role: str) -> tuple[np.ndarray, np.ndarray]:
    """Codes (int64) and distinct values, numbered in order of first appearance."""
    if values.dtype.kind == "O" and _has_pandas():
        import pandas as pd

        codes, uniques = pd.factorize(values, sort=False, use_na_sentinel=True)
        if not (isinstance(uniques, np.ndarray) and uniques.dtype == object):
            uniques = np.fromiter(uniques, dtype=object, count=len(uniques))
        return codes.astype(np.int64, copy=False), uniques
    try:
        uniq, first, inverse = np.unique(values, return_index=True, return_inverse=True)
    except TypeError as exc:
        raise GraphInputError(
            f"{role} ids must be comparable with each other (e.g. all strings or all integers) "
            f"when pandas is not installed; got mixed types"
        ) from exc
    order = np.argsort(first, kind="stable")
    rank = np.empty(order.size, dtype=np.int64)
    rank[order] = np.arange(order.size)
    return rank[inverse.reshape(-1)], uniq[order]


def as_node_names(role: str, names: Any, num_nodes: Optional[int]) -> np.ndarray:
    """A read-only 1-D array of num_nodes distinct, non-missing ids."""
    if isinstance(names, (str, bytes)):
        raise GraphInputError(f"{role} must be a sequence of node ids, one per node; got the single string {names!r}")
    try:
        arr = names if isinstance(names, np.ndarray) else _to_numpy(names)
    except TypeError as exc:
        raise GraphInputError(f"{role} must be a sequence of node ids, one per node; got {type(names).__name__}") from exc
    if arr.ndim != 1:
        raise GraphInputError(f"{role} must be 1-D, one id per node; got shape {arr.shape}")
    if num_nodes is not None and arr.shape[0] != num_nodes:
        raise GraphInputError(f"{role} must hold one id per node ({num_nodes}); got {arr.shape[0]}")
    miss = _missing(arr)
    if miss.any():
        raise GraphInputError(f"{role} must not hold missing ids; position {_first_position(miss)} is {_show(arr[miss][0])}")
    codes, uniq = _factorize(arr, role)
    if uniq.shape[0] != arr.shape[0]:
        first = np.unique(codes, return_index=True)[1]  # first position of each distinct id
        k = int(np.flatnonzero(first[codes] != np.arange(codes.size))[0])
        raise GraphInputError(
            f"{role} must be distinct; the id {_show(arr[k])} appears at positions {int(first[codes[k]])} and {k}"
        )
    arr = arr.copy()
    arr.flags.writeable = False
    return arr


# ---------------------------------------------------------------------- name lookup
def _lookup(names: np.ndarray, query: np.ndarray) -> np.ndarray:
    """Position of each query id in ``names`` (distinct), -1 where absent."""
    if query.size == 0:
        return np.zeros(0, dtype=np.int64)
    if _has_pandas():
        import pandas as pd

        index = pd.Index(names, dtype=object, tupleize_cols=False) if names.dtype.kind == "O" else pd.Index(names)
        q = query
        if query.dtype.kind == "O":
            q = pd.Index(query, dtype=object, tupleize_cols=False)
        try:
            return np.asarray(index.get_indexer(q), dtype=np.int64)
        except (TypeError, ValueError):  # pragma: no cover - exotic id types
            pass
    lookup = {v: i for i, v in enumerate(names.tolist())}  # fallback: one pass over the nodes
    return np.fromiter((lookup.get(v, -1) for v in query.tolist()), dtype=np.int64, count=query.size)


def _graph_names(graph) -> np.ndarray:
    names = graph.node_names
    return np.arange(graph.num_nodes, dtype=np.int64) if names is None else names


def _positions(graph, role: str, query: np.ndarray, *, allow_unknown: bool = False) -> np.ndarray:
    idx = _lookup(_graph_names(graph), query)
    if not allow_unknown:
        unknown = idx < 0
        if unknown.any():
            shown = ", ".join(repr(v) for v in query[unknown][:_SHOW].tolist())
            more = int(unknown.sum())
            what = "node_names" if graph.node_names is not None else "node numbers 0 .. num_nodes - 1"
            raise GraphInputError(
                f"{role} holds {more} id{'s' if more > 1 else ''} not among the graph's nodes "
                f"(checked against its {what}), e.g. {shown}"
            )
    return idx


def index_of_names(graph, names: Any) -> torch.Tensor:
    """DirectedGraph.index_of: ids -> int64 node numbers."""
    collection = isinstance(names, (list, tuple, np.ndarray, torch.Tensor)) or _is_series(names)
    if collection:
        query = _to_numpy(names) if not isinstance(names, np.ndarray) else names
        if query.ndim != 1:
            raise GraphInputError(f"names must be one id or a 1-D sequence of ids; got shape {query.shape}")
    else:
        query = np.empty(1, dtype=object)
        query[0] = names
    idx = _positions(graph, "names", query)
    out = torch.as_tensor(idx, dtype=torch.int64)
    return out if collection else out[0]


def _is_series(value) -> bool:
    return type(value).__module__.split(".")[0] in ("pandas", "pyarrow") and hasattr(value, "__len__")


# ---------------------------------------------------------------------- weights
def _transform(weight_transform, summed: np.ndarray, source_names, target_names) -> np.ndarray:
    if weight_transform is None:
        return summed
    if isinstance(weight_transform, str):
        if weight_transform == "log1p":
            neg = summed < 0
            if neg.any():
                k = _first_position(neg)
                raise GraphInputError(
                    f'weight_transform="log1p" needs non-negative summed weights; the pair '
                    f"{_show(source_names[k])} -> {_show(target_names[k])} sums to {summed[k]}"
                )
            return np.log1p(summed)
        if weight_transform == "rank":
            from scipy.stats import rankdata

            return rankdata(summed, method="average") / max(summed.size, 1)
        raise GraphInputError(
            f"weight_transform must be one of {WEIGHT_TRANSFORMS}, a callable or None; got {weight_transform!r}"
        )
    if not callable(weight_transform):
        raise GraphInputError(
            f"weight_transform must be one of {WEIGHT_TRANSFORMS}, a callable or None; got {type(weight_transform).__name__}"
        )
    out = weight_transform(summed.copy())
    if isinstance(out, torch.Tensor):
        out = out.detach().cpu().numpy()
    out = np.asarray(out)
    if out.shape != summed.shape or out.dtype.kind not in "iufb":
        raise GraphInputError(
            f"weight_transform must return one real number per (source, target) pair, shape {summed.shape}; "
            f"got shape {out.shape}, dtype {out.dtype}"
        )
    out = out.astype(np.float64)
    bad = ~np.isfinite(out)
    if bad.any():
        k = _first_position(bad)
        raise GraphInputError(
            f"weight_transform returned {out[k]} for the pair {_show(source_names[k])} -> {_show(target_names[k])} "
            f"(summed weight {summed[k]}); it must return finite numbers"
        )
    return out


# ---------------------------------------------------------------------- public
def graph_from_table(table: Any, source: str = "source", target: str = "target", weight: Optional[str] = None, *,
                     weight_transform: Optional[str | Callable] = None, nodes: Any = None):
    r"""A DirectedGraph from an edge table: one row per edge ``source -> target``, ids of any kind.

    Node ids are numbered in order of first appearance (row by row, source before target),
    unless ``nodes`` fixes the order (and adds nodes without edges). Rows with the same
    (source, target) are summed, :math:`A[u, v] = \sum_{\text{rows } u \to v} w`; then
    ``weight_transform`` maps each pair's summed weight :math:`A[u, v]`:

    * ``"log1p"``: :math:`\log(1 + A[u, v])` (summed weights must be >= 0), for heavy-tailed
      amounts (payments, volumes, counts);
    * ``"rank"``: the rank of :math:`A[u, v]` among all pairs divided by the number of pairs, in
      (0, 1] (ties share their average rank);
    * a callable: receives the float64 numpy array of summed weights (one per pair, in the
      graph's edge order) and returns an array of the same shape.

    Pairs whose weight is 0 (before or after the transform) are not edges, as for every
    DirectedGraph. ``graph.node_names`` keeps the ids; ``graph.index_of(ids)`` maps them back.

    Args:
        table: a pandas DataFrame, a pyarrow Table, a dict of columns, or the path of a CSV
            (``.csv``, ``.csv.gz``, ``.tsv``) or Parquet (``.parquet``, ``.pq``) file.
        source: name of the column of edge tails (default ``"source"``).
        target: name of the column of edge heads (default ``"target"``).
        weight: name of the numeric weight column, or None (default: every row weighs 1, so a
            pair's weight is its row count).
        weight_transform: keyword-only; None (default), ``"log1p"``, ``"rank"`` or a callable.
        nodes: keyword-only; None (default) or a sequence of distinct ids giving the node order;
            every id of the table must be in it, extra ids become isolated nodes.

    Returns:
        DirectedGraph with ``node_names``.

    Raises:
        GraphInputError: a column that is not in the table (the message names it and lists the
            columns), a missing id, a weight that is not a finite number, an id not in
            ``nodes``, an unknown ``weight_transform``, an unreadable file.

    Example:
        >>> g = graph_from_table({"payer": ["firm_2", "firm_1", "firm_2"],
        ...                       "payee": ["firm_1", "firm_3", "firm_1"],
        ...                       "amount": [100.0, 5.0, 20.0]},
        ...                      source="payer", target="payee", weight="amount", weight_transform="log1p")
        >>> g.node_names.tolist(), [round(w, 3) for w in g.weight.tolist()]
        (['firm_2', 'firm_1', 'firm_3'], [4.796, 1.792])
    """
    from .graph import DirectedGraph

    for role, column in (("source", source), ("target", target)):
        if column is None:
            raise GraphInputError(f"{role} must name a column of the table; got None")
    cols, rows = _read_columns(table, {"source": source, "target": target, "weight": weight})
    src = _check_ids("source", source, cols[source])
    dst = _check_ids("target", target, cols[target])
    w = None if weight is None else _as_float("weight", weight, cols[weight], allow_missing=False)
    if nodes is None:
        # interleaved, so ids are numbered row by row, source before target
        both = np.empty(2 * rows, dtype=src.dtype if src.dtype == dst.dtype else object)
        both[0::2], both[1::2] = src, dst
        codes, names = _factorize(both, "source and target")
        s_idx, d_idx = codes[0::2], codes[1::2]
    else:
        names = as_node_names("nodes", nodes, None)
        s_idx = _positions_in(names, "source", source, src)
        d_idx = _positions_in(names, "target", target, dst)
    n = int(names.shape[0])
    graph = DirectedGraph(s_idx, d_idx, w, n, node_names=names)
    if weight_transform is not None:
        summed = graph.weight.numpy()
        s_pos, d_pos = graph.source.numpy(), graph.target.numpy()
        new = _transform(weight_transform, summed, _NameView(names, s_pos), _NameView(names, d_pos))
        graph = DirectedGraph(graph.source, graph.target, new, n, node_names=graph.node_names)
    return graph


class _NameView:
    """names[positions[k]] on demand (for messages; avoids building an array of all names)."""

    def __init__(self, names, positions):
        self.names, self.positions = names, positions

    def __getitem__(self, k):
        return self.names[self.positions[k]]


def _positions_in(names: np.ndarray, role: str, column, ids: np.ndarray) -> np.ndarray:
    idx = _lookup(names, ids)
    unknown = idx < 0
    if unknown.any():
        distinct = list(dict.fromkeys(ids[unknown][: 50 * _SHOW].tolist()))[:_SHOW]
        raise GraphInputError(
            f"{role} column {column!r} holds ids that are not in nodes ({int(unknown.sum())} rows), e.g. "
            + ", ".join(repr(v) for v in distinct)
        )
    return idx


class NodeFeatures(NamedTuple):
    """A node table aligned to a graph: ``values`` (N, F), ``present`` (N,) bool, ``columns``."""

    values: torch.Tensor
    present: torch.Tensor
    columns: tuple


class NodeLabels(NamedTuple):
    """Labels aligned to a graph: ``labels`` (N,) int64 class numbers, -1 for no label; ``classes``."""

    labels: torch.Tensor
    classes: np.ndarray


def _node_rows(graph, table, id, roles, skip_unknown):
    from .graph import DirectedGraph

    if not isinstance(graph, DirectedGraph):
        raise GraphInputError(f"graph must be a DirectedGraph; got {type(graph).__name__}")
    if not isinstance(skip_unknown, bool):
        raise GraphInputError(f"skip_unknown must be True or False; got {skip_unknown!r}")
    for role, column in {"id": id, **roles}.items():
        if column is None:  # _read_columns skips None (an optional weight); these are required
            raise GraphInputError(f"{role} must be a column name; got None")
    cols, rows = _read_columns(table, {"id": id, **roles})
    ids = _check_ids("id", id, cols[id])
    pos = _positions(graph, f"id column {id!r}", ids, allow_unknown=skip_unknown)
    keep = pos >= 0
    if keep.any():
        kept = pos[keep]
        counts = np.bincount(kept, minlength=graph.num_nodes)
        if counts.max() > 1:
            node = int(np.flatnonzero(counts > 1)[0])
            raws = np.flatnonzero(pos == node)
            raise GraphInputError(
                f"id column {id!r} must name each node at most once; {_show(ids[raws[0]])} is on rows "
                f"{int(raws[0])} and {int(raws[1])} (rows counted from 0)"
            )
    return cols, pos, keep


def node_features(graph, table: Any, id: str = "id", columns: Optional[Sequence[str]] = None, *,
                  dtype: torch.dtype = torch.float32, skip_unknown: bool = False) -> NodeFeatures:
    r"""Line a node-attribute table up with the graph's node order: a features tensor and a mask.

    Row r of the table, with id ``table[id][r]`` = ``graph.node_names[u]``, fills
    ``values[u]``; nodes without a row get zeros and ``present[u] = False``. A missing value in
    an attribute column stays NaN in ``values`` (visible, not filled in). On a graph built from
    integers (no ``node_names``) the ids are the node numbers 0 .. N-1.

    Args:
        graph: a DirectedGraph.
        table: a node table (DataFrame, pyarrow Table, dict of columns, CSV or Parquet path).
        id: name of the id column (default ``"id"``).
        columns: the numeric columns to use, in this order (default None: every column but ``id``).
        dtype: keyword-only; torch.float32 (default) or torch.float64.
        skip_unknown: keyword-only; False (default) refuses ids that are not nodes of the graph,
            True ignores their rows.

    Returns:
        NodeFeatures(values (N, F), present (N,) bool, columns (tuple of names)).

    Example:
        >>> import phasorgraph as pg
        >>> g = pg.DirectedGraph.from_table({"source": ["a", "b"], "target": ["b", "c"]})
        >>> f = node_features(g, {"id": ["c", "a"], "size": [3.0, 1.0]})
        >>> f.values[:, 0].tolist(), f.present.tolist()
        ([1.0, 0.0, 3.0], [True, False, True])
    """
    if dtype not in (torch.float32, torch.float64):
        raise GraphInputError(f"dtype must be torch.float32 or torch.float64; got {dtype}")
    if columns is None:
        table, names = _open(table, None)
        columns = [c for c in names if c != id]
    elif isinstance(columns, str):
        columns = [columns]
    if not isinstance(columns, (list, tuple)):
        raise GraphInputError(f"columns must be None, a column name or a list of column names; got "
                              f"{type(columns).__name__} {str(columns)[:60]}")
    columns = list(columns)
    roles = {f"columns[{i}]": c for i, c in enumerate(columns)}
    cols, pos, keep = _node_rows(graph, table, id, roles, skip_unknown)
    n = graph.num_nodes
    values = np.zeros((n, len(columns)), dtype=np.float64)
    for j, c in enumerate(columns):  # one vectorized pass per column
        values[pos[keep], j] = _as_float(f"columns[{j}]", c, cols[c], allow_missing=True)[keep]
    present = np.zeros(n, dtype=bool)
    present[pos[keep]] = True
    return NodeFeatures(torch.as_tensor(values).to(dtype), torch.as_tensor(present), tuple(columns))


def node_labels(graph, table: Any, id: str = "id", label: str = "label", *, classes: Any = None,
                skip_unknown: bool = False) -> NodeLabels:
    r"""Line a label table up with the graph's node order: class numbers, -1 for unlabeled nodes.

    Labels may be any hashable values (strings, integers). Classes are numbered in the order
    of ``classes`` when given, otherwise in sorted order of the distinct labels (so integer
    labels 0 .. C-1 keep their numbers; first appearance where labels cannot be sorted). Nodes
    without a row, and rows whose label is missing (empty cell, NaN, None), get -1, which
    :func:`phasorgraph.data.split_nodes` leaves out of every split.

    Args:
        graph: a DirectedGraph.
        table: a label table (DataFrame, pyarrow Table, dict of columns, CSV or Parquet path).
        id: name of the id column (default ``"id"``).
        label: name of the label column (default ``"label"``).
        classes: keyword-only; None (default) or the sequence of distinct class values in class
            order (a label outside it is refused).
        skip_unknown: keyword-only; False (default) refuses ids that are not nodes, True
            ignores their rows.

    Returns:
        NodeLabels(labels (N,) int64, classes numpy array (C,) of the original label values).

    Example:
        >>> import phasorgraph as pg
        >>> g = pg.DirectedGraph.from_table({"source": ["a", "b"], "target": ["b", "c"]})
        >>> lab = node_labels(g, {"id": ["a", "c"], "label": ["hub", "leaf"]})
        >>> lab.labels.tolist(), lab.classes.tolist()
        ([0, -1, 1], ['hub', 'leaf'])
    """
    cols, pos, keep = _node_rows(graph, table, id, {"label": label}, skip_unknown)
    raw = cols[label]
    has = keep & ~_missing(raw)
    values = raw[has]
    if classes is None:
        try:
            cls = np.unique(values) if values.dtype.kind != "O" else np.asarray(sorted(set(values.tolist())), dtype=object)
        except TypeError:
            cls = _factorize(values.astype(object), "label")[1]
        if cls.dtype.kind != "O" and values.dtype.kind == "O":
            cls = cls.astype(object)
    else:
        cls = as_node_names("classes", classes, None)
    code = _lookup(cls, values) if values.size else np.zeros(0, dtype=np.int64)
    if (code < 0).any():
        bad = list(dict.fromkeys(values[code < 0].tolist()))[:_SHOW]
        raise GraphInputError(
            f"label column {label!r} holds labels that are not in classes, e.g. {', '.join(repr(v) for v in bad)}; "
            f"classes are {list(cls.tolist())[:20]}"
        )
    labels = np.full(graph.num_nodes, -1, dtype=np.int64)
    labels[pos[has]] = code
    cls = np.asarray(cls).copy()
    return NodeLabels(torch.as_tensor(labels), cls)


# earlier private names, kept so code written against them still imports
_as_node_names, _index_of = as_node_names, index_of_names
