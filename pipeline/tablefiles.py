"""The result tables as CSV and GraphML files, written column by column.

In: pandas tables. Out: files.

:func:`write_csv` writes one table as CSV, byte for byte what
``DataFrame.to_csv(path, index=False)`` writes (comma, ``"`` quoting where a
field needs it, an empty field for a missing value, floats as the shortest
decimal that reads back exactly) in about half its time: each column is
turned into text at once and the rows are joined, where pandas formats
floats through NumPy's slower general formatter. A table with a column of
another kind (float32, dates, categories...) goes through pandas.

:func:`write_graphml` writes the ``segments`` and ``nodes`` tables of an
analysis (one row per segment, keyed by ``segment_id`` and joining
``node_from`` to ``node_to``; one row per node, keyed by ``node_id``) as a
GraphML file (the open standard, http://graphml.graphdrawing.org) of the
undirected multigraph: a ``<node>`` per node row and an ``<edge>`` per
segment row (its ``id`` the segment id), every column a ``<key>`` and every
cell a ``<data>`` element.

GraphML types follow the columns: booleans are ``boolean`` (written ``true`` /
``false``, the XML Schema spelling the standard uses), integers ``long``,
floats ``double`` (the shortest decimal that reads back to the same
float), anything else ``string`` (XML-escaped). A missing cell (NaN, an
infinite float, a missing integer or string) has no ``<data>`` element:
GraphML has no missing value of its own.

The file reads back with ``networkx.read_graphml(path,
force_multigraph=True)``. It was written through networkx's writer before,
one attribute at a time (1.7 million data elements on a 512^3 capillary bed:
about 9 s of the 27 s the command took); formatting whole columns at once
takes well under a second there.

Both work a chunk of rows at a time (:data:`_ROWS`), so memory holds one
chunk's texts however large the tables; :func:`write_graph_files` writes
the two tables' CSV files and the GraphML in one pass, each float formatted
once for both.
"""

from __future__ import annotations

import math
from pathlib import Path
from xml.sax.saxutils import escape, quoteattr

import numpy as np
import pandas as pd

__all__ = ["write_csv", "write_graphml", "write_graph_files"]

_HEAD = ('<?xml version="1.0" encoding="utf-8"?>\n'
         '<graphml xmlns="http://graphml.graphdrawing.org/xmlns" '
         'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance" '
         'xsi:schemaLocation="http://graphml.graphdrawing.org/xmlns '
         'http://graphml.graphdrawing.org/xmlns/1.0/graphml.xsd">\n')


def _csv_field(text: str) -> str:
    """A field as the csv module's minimal quoting writes it."""
    if any(c in text for c in ',"\r\n'):
        return '"' + text.replace('"', '""') + '"'
    return text


def _float_texts(table: pd.DataFrame, name, memo: dict | None) -> list[str | None]:
    """repr of every cell of a float64 column (the shortest decimal that reads back exact), None for NaN."""
    # keyed by the table's identity, which the memo keeps alive with the texts
    key = (id(table), name)
    if memo is not None and key in memo:
        return memo[key][1]
    out = [None if x != x else repr(x) for x in table[name].tolist()]
    if memo is not None:
        memo[key] = (table, out)
    return out


def _csv_texts(table: pd.DataFrame, name, memo: dict | None = None) -> list[str] | None:
    """The column's CSV fields, or None for a column pandas must format."""
    col = table[name]
    dtype = col.dtype
    if isinstance(dtype, np.dtype):
        if dtype == np.float64:
            return ["" if x is None else x for x in _float_texts(table, name, memo)]
        if dtype.kind == "b":
            return ["True" if x else "False" for x in col.tolist()]
        if dtype.kind in "iu":
            return [str(x) for x in col.tolist()]
        if dtype != object:
            return None
    elif isinstance(dtype, pd.StringDtype):
        out = col.fillna("").tolist()
        # quoted where the csv module's minimal quoting quotes
        for i in np.flatnonzero(col.str.contains('[,"\r\n]', regex=True, na=False).to_numpy()).tolist():
            out[i] = _csv_field(out[i])
        return out
    elif pd.api.types.is_integer_dtype(dtype) or pd.api.types.is_bool_dtype(dtype):
        # nullable integers and booleans: never quoted
        return ["" if m else str(x) for x, m in zip(col.tolist(), col.isna().tolist())]
    else:
        return None
    values = col.tolist()
    missing = col.isna().tolist()
    out = []
    for x, m in zip(values, missing):
        if m:
            out.append("")
        elif isinstance(x, (str, bool, int, np.integer, np.bool_)) or type(x) is float:
            out.append(_csv_field(str(x)))
        else:
            return None  # a value pandas may format its own way
    return out


def write_csv(table: pd.DataFrame, path) -> None:
    """Write ``table`` as ``table.to_csv(path, index=False)`` would.

    Parameters
    ----------
    table : DataFrame, (R, C)
    path : str or Path
        File to write (replaced if it exists).
    """
    with _CsvFile(table, path) as csv:
        for a, b in _chunks(len(table)):
            csv.rows(table.iloc[a:b], {})


def _chunks(n: int) -> list[tuple[int, int]]:
    """Row ranges of at most :data:`_ROWS` rows."""
    return [(a, min(a + _ROWS, n)) for a in range(0, n, _ROWS)]


# Rows formatted at a time: the texts of a chunk take a few megabytes, where
# those of a whole table of a large volume (a million rows, 40 columns) took
# gigabytes.
_ROWS = 8192


class _CsvFile:
    """A CSV file written chunk by chunk as :func:`write_csv` writes it; pandas's writer where needed.

    A table with one column (a lone empty field is quoted) or a column of a
    kind pandas formats its own way is written by pandas, whole, on close.
    """

    def __init__(self, table: pd.DataFrame, path):
        self.table, self.path = table, Path(path)
        self.fast = table.shape[1] >= 2 and table.columns.is_unique
        self.fh = None

    def __enter__(self) -> "_CsvFile":
        if self.fast:
            self.fh = open(self.path, "w", encoding="utf-8", newline="\n")
            self.fh.write(",".join(_csv_field(str(name)) for name in self.table.columns) + "\n")
        return self

    def rows(self, part: pd.DataFrame, memo: dict) -> None:
        """Append the rows of ``part`` (floats formatted into ``memo``, shared with the GraphML)."""
        if not self.fast:
            return
        columns = [_csv_texts(part, name, memo) for name in part.columns]
        if any(c is None for c in columns):
            self.fast = False
            return
        self.fh.writelines(",".join(row) + "\n" for row in zip(*columns))

    def __exit__(self, *exc) -> None:
        if self.fh is not None:
            self.fh.close()
        if exc[0] is None and not self.fast:
            self.table.to_csv(self.path, index=False)


def _kind(col: pd.Series) -> str:
    """GraphML type of a column; a column of Python objects by what it holds."""
    dtype = col.dtype
    if dtype == object:
        held = col.dropna().tolist()
        if held and all(isinstance(x, (bool, np.bool_)) for x in held):
            return "boolean"
        if held and all(isinstance(x, (int, np.integer)) and not isinstance(x, (bool, np.bool_)) for x in held):
            return "long"
        if held and all(isinstance(x, (float, np.floating)) for x in held):
            return "double"
        return "string"
    if pd.api.types.is_bool_dtype(dtype):
        return "boolean"
    if pd.api.types.is_integer_dtype(dtype):
        return "long"
    if pd.api.types.is_float_dtype(dtype):
        return "double"
    return "string"


def _cells(table: pd.DataFrame, name, kind: str, key: str, memo: dict | None) -> list[str]:
    """The column's ``<data>`` lines, '' where the cell is missing."""
    col = table[name]
    head = f'  <data key="{key}">'
    tail = "</data>\n"
    if kind == "double":
        if col.dtype == np.float64:
            texts = _float_texts(table, name, memo)
        else:
            texts = [None if x != x else repr(x) for x in col.to_numpy(dtype=np.float64, na_value=np.nan).tolist()]
        # infinite floats have no GraphML double either
        return ["" if x is None or x in ("inf", "-inf") else f"{head}{x}{tail}" for x in texts]
    missing = col.isna().to_numpy().tolist()
    values = col.tolist()
    if kind == "boolean":
        return ["" if m else f"{head}{'true' if x else 'false'}{tail}" for x, m in zip(values, missing)]
    if kind == "long":
        return ["" if m else f"{head}{int(x)}{tail}" for x, m in zip(values, missing)]
    out = []
    for x, m in zip(values, missing):
        if m or (isinstance(x, float) and math.isnan(x)):
            out.append("")
        else:
            out.append(f"{head}{escape(str(x))}{tail}")
    return out


def _keys(table: pd.DataFrame, first_key: int, domain: str) -> tuple[list[str], list[tuple[str, str, str]]]:
    """``<key>`` lines of a table's columns, and (column, GraphML type, key id) of each."""
    lines, cols = [], []
    for k, name in enumerate(table.columns):
        key = f"d{first_key + k}"
        kind = _kind(table[name])
        lines.append(f'<key id="{key}" for="{domain}" attr.name={quoteattr(str(name))} attr.type="{kind}"/>\n')
        cols.append((name, kind, key))
    return lines, cols


def _bodies(part: pd.DataFrame, cols, memo: dict | None) -> list[str]:
    """Per-row ``<data>`` blocks of a chunk of rows."""
    columns = [_cells(part, name, kind, key, memo) for name, kind, key in cols]
    return ["".join(parts) for parts in zip(*columns)] if columns else [""] * len(part)


def write_graphml(segments: pd.DataFrame, nodes: pd.DataFrame, path) -> None:
    """Write the multigraph of ``nodes`` and ``segments`` as GraphML.

    Parameters
    ----------
    segments : DataFrame, (S, ...)
        One row per segment with integer columns ``segment_id``,
        ``node_from`` and ``node_to``; every column becomes an edge
        attribute.
    nodes : DataFrame, (N, ...)
        One row per node with an integer column ``node_id``; every column
        becomes a node attribute.
    path : str or Path
        File to write (replaced if it exists).
    """
    write_graph_files(segments, nodes, graphml=path)


def write_graph_files(segments: pd.DataFrame, nodes: pd.DataFrame, *, graphml, segments_csv=None,
                      nodes_csv=None) -> None:
    """The GraphML of :func:`write_graphml` and, optionally, both tables as :func:`write_csv`, in one pass.

    Rows go chunk by chunk to the CSV and the GraphML together, each float
    formatted once for both; memory stays at a chunk's texts whatever the
    tables' size.
    """
    node_keys, node_cols = _keys(nodes, 0, "node")
    edge_keys, edge_cols = _keys(segments, len(node_keys), "edge")
    with open(Path(graphml), "w", encoding="utf-8", newline="\n") as fh:
        fh.write(_HEAD)
        fh.writelines(node_keys)
        fh.writelines(edge_keys)
        fh.write('<graph edgedefault="undirected">\n')
        with _optional_csv(nodes, nodes_csv) as csv:
            for a, b in _chunks(len(nodes)):
                part, memo = nodes.iloc[a:b], {}
                csv.rows(part, memo)
                ids = part["node_id"].astype(np.int64).tolist()
                fh.writelines(f'<node id="{n}">\n{body}</node>\n' for n, body in zip(ids, _bodies(part, node_cols, memo)))
        with _optional_csv(segments, segments_csv) as csv:
            for a, b in _chunks(len(segments)):
                part, memo = segments.iloc[a:b], {}
                csv.rows(part, memo)
                ends = zip(part["node_from"].astype(np.int64).tolist(), part["node_to"].astype(np.int64).tolist(),
                           part["segment_id"].astype(np.int64).tolist())
                fh.writelines(f'<edge source="{u}" target="{v}" id="{s}">\n{body}</edge>\n'
                              for (u, v, s), body in zip(ends, _bodies(part, edge_cols, memo)))
        fh.write("</graph>\n</graphml>\n")


class _NoCsv:
    def __enter__(self):
        return self

    def rows(self, part, memo):
        pass

    def __exit__(self, *exc):
        return None


def _optional_csv(table, path):
    return _CsvFile(table, path) if path is not None else _NoCsv()
