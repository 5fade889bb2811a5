"""Tables in: DirectedGraph.from_table, node_names / index_of, node_features, node_labels.

References: pandas' own ``groupby(...).sum()`` for summing duplicate rows, ``pandas.unique``
for first-appearance order, ``numpy.log1p`` and ``scipy.stats.rankdata`` for the weight
transforms, and a plain Python dict as the id -> row map.
"""

import os
import pickle

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
import torch
from hypothesis import given
from hypothesis import strategies as st
from scipy.stats import rankdata

from phasorgraph import DirectedGraph, GraphInputError
from phasorgraph.data import GraphBatch, directed_cycle, split_link_presence
from phasorgraph.tables import graph_from_table, node_features, node_labels


def _named_edges(g: DirectedGraph) -> dict:
    """{(source name, target name): weight}: the graph as names, independent of node order."""
    names = g.node_names.tolist()
    return {(names[s], names[t]): w for s, t, w in zip(g.source.tolist(), g.target.tolist(), g.weight.tolist())}


def _pandas_reference(df: pd.DataFrame, source="source", target="target", weight="w") -> dict:
    """Summed weight per (source, target) pair by pandas groupby (zero sums are not edges)."""
    summed = df.groupby([source, target], sort=False)[weight].sum()
    return {k: v for k, v in summed.items() if v != 0}


PAYMENTS = pd.DataFrame({
    "payer": ["firm_2", "firm_1", "firm_2", "firm_3", "firm_1"],
    "payee": ["firm_1", "firm_3", "firm_1", "firm_3", "firm_4"],
    "amount": [100.0, 5.0, 20.0, 1e6, 0.5],
})


@pytest.mark.parametrize("container", ["pandas", "arrow", "dict", "csv", "parquet", "tsv"])
def test_every_container_gives_the_same_graph(container, tmp_path):
    if container == "pandas":
        table = PAYMENTS
    elif container == "arrow":
        table = pa.Table.from_pandas(PAYMENTS)
    elif container == "dict":
        table = {c: PAYMENTS[c].tolist() for c in PAYMENTS.columns}
    elif container == "csv":
        table = tmp_path / "pay.csv"
        PAYMENTS.to_csv(table, index=False)
    elif container == "tsv":
        table = str(tmp_path / "pay.tsv")
        PAYMENTS.to_csv(table, index=False, sep="\t")
    else:
        table = tmp_path / "pay.parquet"
        PAYMENTS.to_parquet(table)
    g = DirectedGraph.from_table(table, "payer", "payee", "amount")
    # first appearance, row by row, source before target (pandas.unique of the interleaved ids)
    interleaved = np.stack([PAYMENTS.payer.to_numpy(), PAYMENTS.payee.to_numpy()], axis=1).ravel()
    assert g.node_names.tolist() == pd.unique(interleaved).tolist()
    assert _named_edges(g) == _pandas_reference(PAYMENTS, "payer", "payee", "amount")


def test_weight_transforms_apply_to_each_pairs_summed_weight():
    ref = _pandas_reference(PAYMENTS, "payer", "payee", "amount")
    g = DirectedGraph.from_table(PAYMENTS, "payer", "payee", "amount", weight_transform="log1p")
    assert _named_edges(g) == pytest.approx({k: float(np.log1p(v)) for k, v in ref.items()})  # numpy.log1p
    r = DirectedGraph.from_table(PAYMENTS, "payer", "payee", "amount", weight_transform="rank")
    keys = list(ref)
    expected = rankdata([ref[k] for k in keys]) / len(keys)  # scipy.stats.rankdata, average ties
    assert _named_edges(r) == pytest.approx(dict(zip(keys, expected.tolist())))
    c = DirectedGraph.from_table(PAYMENTS, "payer", "payee", "amount", weight_transform=np.sqrt)
    assert _named_edges(c) == pytest.approx({k: v ** 0.5 for k, v in ref.items()})
    # no weight column: each row weighs 1, so a pair's weight is its row count (pandas size)
    counts = PAYMENTS.groupby(["payer", "payee"], sort=False).size().to_dict()
    assert _named_edges(DirectedGraph.from_table(PAYMENTS, "payer", "payee")) == counts


def test_integer_and_mixed_ids_keep_their_types():
    g = DirectedGraph.from_table({"source": [10, 20, 10], "target": [20, 30, 20]})
    assert g.node_names.tolist() == [10, 20, 30] and g.weight.tolist() == [2.0, 1.0]
    mixed = DirectedGraph.from_table({"source": [1, "a"], "target": ["a", 2]})
    assert mixed.node_names.tolist() == [1, "a", 2]  # 1 is not turned into "1"
    assert mixed.index_of([2, "a"]).tolist() == [2, 1]


def test_nodes_fixes_the_order_and_adds_isolated_nodes():
    g = DirectedGraph.from_table({"source": ["a"], "target": ["b"]}, nodes=["z", "b", "a"])
    assert g.node_names.tolist() == ["z", "b", "a"] and g.num_nodes == 3
    assert g.source.tolist() == [2] and g.target.tolist() == [1]


def test_index_of_and_unknown_ids():
    g = DirectedGraph.from_table(PAYMENTS, "payer", "payee")
    lookup = {name: i for i, name in enumerate(g.node_names.tolist())}  # a plain dict as reference
    query = ["firm_4", "firm_2", "firm_2"]
    assert g.index_of(query).tolist() == [lookup[q] for q in query]
    assert g.index_of(np.array(query)).tolist() == [lookup[q] for q in query]
    assert g.index_of(pd.Series(query)).tolist() == [lookup[q] for q in query]
    assert g.index_of("firm_3").dim() == 0 and int(g.index_of("firm_3")) == lookup["firm_3"]
    with pytest.raises(GraphInputError, match=r"names holds 2 ids not among the graph's nodes .*'nobody', 'firm_9'"):
        g.index_of(["firm_1", "nobody", "firm_9"])
    # a graph built from integers is named by its node numbers
    plain = directed_cycle(4)
    assert plain.index_of([3, 0]).tolist() == [3, 0]
    with pytest.raises(GraphInputError, match=r"node numbers 0 \.\. num_nodes - 1\), e\.g\. 7"):
        plain.index_of([7])


def test_names_survive_every_helper_batching_and_splits():
    g = DirectedGraph.from_table(PAYMENTS, "payer", "payee", "amount")
    named = _named_edges(g)
    perm = torch.tensor([3, 1, 0, 2])
    assert _named_edges(g.permute(perm)) == named
    assert g.permute(perm).node_names.tolist() == g.node_names[perm.numpy()].tolist()
    h, p = g.locality_order()
    assert _named_edges(h) == named and h.node_names.tolist() == g.node_names[p.numpy()].tolist()
    assert _named_edges(g.reverse()) == {(v, u): w for (u, v), w in named.items()}
    sym = _named_edges(g.symmetrized())
    for (u, v), w in named.items():
        assert sym[(u, v)] == pytest.approx((w + named.get((v, u), 0.0)) / 2)
    split = split_link_presence(g, 0.25, 0.25, seed=0)
    assert split.train_graph.node_names.tolist() == g.node_names.tolist()
    b = GraphBatch.from_graphs([g, directed_cycle(2), g])
    assert b.graph.node_names.tolist()[:4] == [(0, n) for n in g.node_names.tolist()]
    assert b.graph.node_names.tolist()[4:6] == [(1, 0), (1, 1)]
    assert int(b.graph.index_of([(2, "firm_3")])[0]) == 6 + int(g.index_of("firm_3"))
    back = pickle.loads(pickle.dumps(g))
    assert back == g and back.node_names.tolist() == g.node_names.tolist()
    assert not back.node_names.flags.writeable and not g.node_names.flags.writeable


ids = st.sampled_from(["a", "b", "c", "d", "e", 1, 2, (0, "t")])


@given(st.lists(st.tuples(ids, ids, st.floats(0.0, 50.0, allow_nan=False)), min_size=0, max_size=12),
       st.permutations(range(8)))
def test_property_table_graph_matches_pandas_groupby_under_any_relabelling(rows, order):
    """Hypothesis: any id types; adjacency = pandas groupby sum; permute keeps named edges."""
    table = {"source": [r[0] for r in rows], "target": [r[1] for r in rows], "w": [r[2] for r in rows]}
    g = DirectedGraph.from_table(table, weight="w")
    df = pd.DataFrame({"source": pd.Series(table["source"], dtype=object),
                       "target": pd.Series(table["target"], dtype=object), "w": table["w"]})
    assert _named_edges(g) == pytest.approx(_pandas_reference(df)) if rows else g.num_nodes == 0
    n = g.num_nodes
    perm = torch.tensor([i for i in order if i < n], dtype=torch.int64)
    assert _named_edges(g.permute(perm)) == _named_edges(g)
    assert g.index_of(list(g.node_names)).tolist() == list(range(n))


def test_node_features_align_and_mask():
    g = DirectedGraph.from_table(PAYMENTS, "payer", "payee")
    lookup = {name: i for i, name in enumerate(g.node_names.tolist())}
    attrs = pd.DataFrame({"firm": ["firm_3", "firm_1"], "size": [3.0, np.nan], "age": [7, 2]})
    f = node_features(g, attrs, id="firm")
    assert f.columns == ("size", "age") and f.values.shape == (4, 2) and f.values.dtype == torch.float32
    assert f.present.tolist() == [name in ("firm_3", "firm_1") for name in g.node_names.tolist()]
    assert f.values[lookup["firm_3"]].tolist() == [3.0, 7.0]
    assert np.isnan(f.values[lookup["firm_1"], 0].item()) and f.values[lookup["firm_1"], 1].item() == 2.0  # NaN stays
    assert f.values[lookup["firm_2"]].tolist() == [0.0, 0.0]
    only = node_features(g, attrs, id="firm", columns="age", dtype=torch.float64)
    assert only.values.shape == (4, 1) and only.values.dtype == torch.float64
    with pytest.raises(GraphInputError, match=r"id column 'firm' holds 1 id not among the graph's nodes .*'firm_77'"):
        node_features(g, {"firm": ["firm_77"], "size": [1.0]}, id="firm")
    skipped = node_features(g, {"firm": ["firm_77", "firm_2"], "size": [1.0, 2.0]}, id="firm", skip_unknown=True)
    assert skipped.present.sum().item() == 1 and skipped.values[lookup["firm_2"], 0].item() == 2.0
    with pytest.raises(GraphInputError, match=r"id column 'firm' must name each node at most once; 'firm_2' is on rows 0 and 1"):
        node_features(g, {"firm": ["firm_2", "firm_2"], "size": [1.0, 2.0]}, id="firm")
    with pytest.raises(GraphInputError, match=r"columns\[0\] column 'kind' must hold numbers; got the value 'big'"):
        node_features(g, {"firm": ["firm_2"], "kind": np.array(["big"], dtype=object)}, id="firm")


def test_node_labels_numbers_classes_and_marks_unlabeled(tmp_path):
    g = DirectedGraph.from_table(PAYMENTS, "payer", "payee")
    lookup = {name: i for i, name in enumerate(g.node_names.tolist())}
    path = tmp_path / "roles.csv"
    pd.DataFrame({"id": ["firm_1", "firm_2", "firm_4"], "role": ["supplier", "bank", None]}).to_csv(path, index=False)
    lab = node_labels(g, path, label="role")
    assert lab.classes.tolist() == ["bank", "supplier"]  # sorted
    expect = {"firm_1": 1, "firm_2": 0, "firm_3": -1, "firm_4": -1}  # no row / empty cell -> -1
    assert lab.labels.tolist() == [expect[n] for n in g.node_names.tolist()]
    ints = node_labels(g, {"id": ["firm_3", "firm_1"], "label": [2, 0]})
    assert ints.classes.tolist() == [0, 2] and int(ints.labels[lookup["firm_3"]]) == 1
    fixed = node_labels(g, {"id": ["firm_3"], "label": [2]}, classes=[0, 1, 2])
    assert int(fixed.labels[lookup["firm_3"]]) == 2
    with pytest.raises(GraphInputError, match=r"label column 'label' holds labels that are not in classes, e\.g\. 5"):
        node_labels(g, {"id": ["firm_3"], "label": [5]}, classes=[0, 1, 2])


@pytest.mark.parametrize("call, match", [
    (lambda: DirectedGraph.from_table(PAYMENTS, "from", "payee"),
     r"source column 'from' is not in the table \(DataFrame\); its columns are \['payer', 'payee', 'amount'\]"),
    (lambda: DirectedGraph.from_table(PAYMENTS, "payer", "to"), r"target column 'to' is not in the table"),
    (lambda: DirectedGraph.from_table(PAYMENTS, "payer", "payee", "value"), r"weight column 'value' is not in the table"),
    (lambda: DirectedGraph.from_table({"source": ["a", None], "target": ["b", "c"]}),
     r"source column 'source' has a missing id at row 1"),
    (lambda: DirectedGraph.from_table({"source": ["a"], "target": ["b"], "w": [np.nan]}, weight="w"),
     r"weight column 'w' must be finite; row 0 .* holds nan"),
    (lambda: DirectedGraph.from_table({"source": ["a"], "target": ["b"], "w": ["ten"]}, weight="w"),
     r"weight column 'w' must hold numbers"),
    (lambda: DirectedGraph.from_table(PAYMENTS, "payer", "payee", "amount", weight_transform="sqrt"),
     r"weight_transform must be one of \('log1p', 'rank'\), a callable or None; got 'sqrt'"),
    (lambda: DirectedGraph.from_table({"source": ["a"], "target": ["b"], "w": [-3.0]}, weight="w", weight_transform="log1p"),
     r"weight_transform=\"log1p\" needs non-negative summed weights; the pair 'a' -> 'b' sums to -3\.0"),
    (lambda: DirectedGraph.from_table({"source": ["a"], "target": ["b"]}, weight_transform=lambda w: w[:0]),
     r"weight_transform must return one real number per \(source, target\) pair"),
    (lambda: DirectedGraph.from_table({"source": ["a"], "target": ["b"]}, nodes=["a"]),
     r"target column 'target' holds ids that are not in nodes \(1 rows\), e\.g\. 'b'"),
    (lambda: DirectedGraph.from_table({"source": ["a"], "target": ["b"]}, nodes=["a", "b", "a"]),
     r"nodes must be distinct; the id 'a' appears at positions 0 and 2"),
    (lambda: DirectedGraph.from_table([("a", "b")]), r"table must be a pandas DataFrame, a pyarrow Table, a dict"),
    (lambda: DirectedGraph.from_table("no/such/file.csv"), r"no file at 'no/such/file\.csv'"),
    (lambda: DirectedGraph.from_table(__file__), r"cannot tell the format of .* accepted file endings"),
    (lambda: DirectedGraph([0], [1], node_names=["a"]), r"node_names must hold one id per node \(2\); got 1"),
    (lambda: node_features(directed_cycle(3), {"id": [0]}, dtype=torch.int64), r"dtype must be torch\.float32"),
])
def test_bad_table_input_is_refused_with_a_clear_message(call, match):
    with pytest.raises(GraphInputError, match=match):
        call()


def test_empty_table_gives_an_empty_graph():
    g = DirectedGraph.from_table({"source": [], "target": []})
    assert g.num_nodes == 0 and g.num_edges == 0 and g.node_names.tolist() == []
    assert g.index_of([]).tolist() == []


def test_csv_ids_survive_a_round_trip(tmp_path):
    path = os.path.join(tmp_path, "edges.csv.gz")
    pd.DataFrame({"source": ["x", "y"], "target": ["y", "z"]}).to_csv(path, index=False)
    assert graph_from_table(path).node_names.tolist() == ["x", "y", "z"]
