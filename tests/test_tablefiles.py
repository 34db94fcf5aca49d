"""CSV and GraphML writers of the result tables, against pandas' and networkx's own writers.

References: ``pandas.DataFrame.to_csv(index=False)`` for the CSV bytes, and
``networkx.write_graphml`` / ``networkx.read_graphml`` for the GraphML
graph (the writer vesselflow used before, attribute by attribute).
"""

import math

import networkx as nx
import numpy as np
import pandas as pd
import pytest

from pipeline import synthetic
from pipeline.tablefiles import write_csv, write_graphml

TABLES = ("segments", "nodes", "bifurcations", "vessels", "levels", "orders", "order_connectivity")


@pytest.fixture(scope="module")
def bed(analyse):
    """A small capillary bed at a coarse z step, flow solved (every column filled)."""
    return analyse("bed-tablefiles", lambda: synthetic.capillary_bed(shape_um=(70, 70, 70), seed=3),
                   spacing=(2.0, 1.0, 1.0))[2]


@pytest.mark.parametrize("name", TABLES)
def test_csv_bytes_are_pandas_bytes(bed, name, tmp_path):
    table = getattr(bed, name)
    assert len(table) > 0
    write_csv(table, tmp_path / "ours.csv")
    table.to_csv(tmp_path / "pandas.csv", index=False)
    assert (tmp_path / "ours.csv").read_bytes() == (tmp_path / "pandas.csv").read_bytes()


def _awkward():
    """Quotes, commas, line breaks, missing values of every kind, extreme floats."""
    return pd.DataFrame({
        "name": pd.Series(['plain', 'a,b', 'say "hi"', "two\nlines", None, ""], dtype="str"),
        "obj": pd.Series(["x", 3, None, 2.5, True, "y,z"], dtype=object),
        "level": pd.array([1, None, 3, 4, None, 6], dtype="Int64"),
        "flag": [True, False, True, True, False, False],
        "flag_na": pd.array([True, None, False, True, None, False], dtype="boolean"),
        "count": np.arange(6, dtype=np.int64) - 3,
        "value": [0.1 + 0.2, np.nan, -0.0, 1e-300, 1.2345678901234567e17, np.inf],
        "tiny": [5e-324, -np.inf, 1e16, 123456.789, 1.0, 2.0 / 3.0],
    })


@pytest.mark.parametrize("columns", [None, ["name", "value"], ["value"], ["flag", "level"]])
def test_csv_bytes_on_awkward_values(columns, tmp_path):
    table = _awkward() if columns is None else _awkward()[columns]
    write_csv(table, tmp_path / "ours.csv")
    table.to_csv(tmp_path / "pandas.csv", index=False)
    assert (tmp_path / "ours.csv").read_bytes() == (tmp_path / "pandas.csv").read_bytes()


@pytest.mark.parametrize("table", [
    pd.DataFrame({"a": pd.Series([], dtype=float), "b": pd.Series([], dtype=np.int64)}),
    pd.DataFrame({"a": np.float32([0.1, 0.2]), "b": [1, 2]}),  # float32: pandas' own formatting
    pd.DataFrame({"when": pd.to_datetime(["2026-01-02", None]), "b": [1, 2]}),
])
def test_csv_bytes_on_empty_and_foreign_columns(table, tmp_path):
    write_csv(table, tmp_path / "ours.csv")
    table.to_csv(tmp_path / "pandas.csv", index=False)
    assert (tmp_path / "ours.csv").read_bytes() == (tmp_path / "pandas.csv").read_bytes()


def _reference_graph(segments, nodes):
    """The multigraph networkx writes: every finite cell an attribute of its Python type."""
    def clean(row):
        out = {}
        for k, v in row.items():
            if v is None or v is pd.NA or (isinstance(v, float) and not math.isfinite(v)):
                continue
            out[k] = v.item() if isinstance(v, np.generic) else v
        return out

    G = nx.MultiGraph()
    for row in nodes.to_dict("records"):
        G.add_node(int(row["node_id"]), **clean(row))
    for row in segments.to_dict("records"):
        G.add_edge(int(row["node_from"]), int(row["node_to"]), key=int(row["segment_id"]), **clean(row))
    return G


def _edges(G):
    return {(min(u, v), max(u, v), k): d for u, v, k, d in G.edges(keys=True, data=True)}


def test_graphml_reads_back_as_networkx_writes_it(bed, tmp_path):
    write_graphml(bed.segments, bed.nodes, tmp_path / "ours.graphml")
    nx.write_graphml(_reference_graph(bed.segments, bed.nodes), tmp_path / "networkx.graphml")
    ours = nx.read_graphml(tmp_path / "ours.graphml", force_multigraph=True)
    ref = nx.read_graphml(tmp_path / "networkx.graphml", force_multigraph=True)
    assert sorted(ours.nodes) == sorted(ref.nodes)
    assert all(ours.nodes[n] == ref.nodes[n] for n in ref.nodes)
    assert _edges(ours) == _edges(ref)
    # Every cell that is not missing is there, with its exact value.
    seg = bed.segments.set_index("segment_id")
    e = _edges(ours)
    some = next(iter(e.values()))
    sid = int(some["segment_id"])
    assert some["length_um"] == seg.loc[sid, "length_um"]
    assert len(e) == len(seg) and ours.number_of_nodes() == len(bed.nodes)


def test_graphml_types_escaping_and_missing_cells(tmp_path):
    nodes = pd.DataFrame({"node_id": [0, 1], "kind": pd.Series(["a<b&c", None], dtype="str"),
                          "radius_um": [1.5, np.nan]})
    segments = pd.DataFrame({"segment_id": [7, 9], "node_from": [0, 1], "node_to": [1, 1],
                             "perfused": [True, False], "level": pd.array([2, None], dtype="Int64"),
                             "flow_nl_min": [np.inf, -0.25], "note": pd.Series(['"q"', None], dtype=object)})
    write_graphml(segments, nodes, tmp_path / "g.graphml")
    G = nx.read_graphml(tmp_path / "g.graphml", force_multigraph=True)
    assert G.nodes["0"] == {"node_id": 0, "kind": "a<b&c", "radius_um": 1.5}
    assert G.nodes["1"] == {"node_id": 1}  # missing string and NaN leave no data element
    e = _edges(G)
    assert e[("0", "1", 7)] == {"segment_id": 7, "node_from": 0, "node_to": 1, "perfused": True, "level": 2,
                                  "note": '"q"'}
    assert e[("1", "1", 9)] == {"segment_id": 9, "node_from": 1, "node_to": 1, "perfused": False,
                                  "flow_nl_min": -0.25}
    text = (tmp_path / "g.graphml").read_text()
    # GraphML booleans in the XML Schema spelling (the standard's); integers as long
    assert ">true</data>" in text and ">True</data>" not in text
    assert 'attr.name="level" attr.type="long"' in text
