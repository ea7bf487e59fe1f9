"""Reading edge lists: header detection, undirected ties, dropped and merged lines, and every bad input."""

from __future__ import annotations

from pathlib import Path

import networkx as nx
import numpy as np
import pytest

from designcalc.edgelist import EdgeListError, parse_edge_list, read_edge_list
from designcalc.errors import DesignCalcError


def _write(tmp_path: Path, text: str | bytes, name: str = "ties.csv") -> Path:
    path = tmp_path / name
    if isinstance(text, bytes):
        path.write_bytes(text)
    else:
        path.write_text(text, encoding="utf-8")
    return path


def test_header_is_detected_and_gives_the_same_network(tmp_path: Path) -> None:
    """A header line is recognised and skipped; with or without it the network is the same."""
    body = "10,20\n20,30\n30,10\n40,10\n"
    plain = read_edge_list(_write(tmp_path, body, "plain.csv"))
    headed = read_edge_list(_write(tmp_path, "from,to\n" + body, "headed.csv"))
    assert plain.summary.header is None
    assert headed.summary.header == ("from", "to")
    assert (plain.adjacency != headed.adjacency).nnz == 0
    assert plain.ids.tolist() == [10, 20, 30, 40]


def test_adjacency_matches_networkx_on_the_same_lines() -> None:
    """The adjacency equals networkx's undirected Graph built from the same lines (reference: nx.parse_edgelist)."""
    rng = np.random.default_rng(11)
    pairs = rng.integers(0, 60, size=(400, 2))
    lines = [f"{a},{b}" for a, b in pairs]
    edges = parse_edge_list("\n".join(lines))
    reference = nx.parse_edgelist(lines, delimiter=",", nodetype=int, create_using=nx.Graph)
    reference.remove_edges_from(list(nx.selfloop_edges(reference)))
    expected = nx.to_scipy_sparse_array(reference, nodelist=edges.ids.tolist(), format="csr")
    assert (edges.adjacency != expected).nnz == 0
    assert edges.n_ties == reference.number_of_edges()


def test_adjacency_is_canonical_symmetric_csr_with_int32_indices() -> None:
    """The adjacency is 0/1, symmetric, zero-diagonal CSR with sorted int32 indices."""
    edges = parse_edge_list("5,7\n7,9\n9,5\n5,5\n7,5\n")
    a = edges.adjacency
    assert a.format == "csr" and a.indices.dtype == np.int32 and a.indptr.dtype == np.int32
    assert a.has_sorted_indices
    assert (a != a.T).nnz == 0 and not a.diagonal().any()
    assert set(np.unique(a.data)) == {1.0}


def test_reversed_and_repeated_ties_are_merged_keeping_the_largest_weight() -> None:
    """(a, b) and (b, a) are one tie; repeats are counted with their first line and keep the maximum weight."""
    text = "id1,id2,w\n1,2,0.5\n3,4,1\n2,1,2.5\n1,2,1.0\n"
    edges = parse_edge_list(text, source="w.csv")
    s = edges.summary
    assert (edges.n_ties, s.n_duplicate_lines, s.first_duplicate_line) == (2, 2, 4)
    assert edges.weights is not None and edges.weights[0, 1] == 2.5 and edges.weights[1, 0] == 2.5
    assert any("merged 2 line(s)" in m and "line 4" in m and "largest weight" in m for m in s.messages())


def test_self_ties_are_dropped_but_their_nodes_kept() -> None:
    """A self tie is dropped and counted with its first line; its node stays, as an isolate."""
    edges = parse_edge_list("1,2\n3,3\n2,2\n", source="loops.csv")
    s = edges.summary
    assert (s.n_self_ties, s.first_self_tie_line) == (2, 2)
    assert edges.ids.tolist() == [1, 2, 3] and edges.n_ties == 1
    assert np.diff(edges.adjacency.indptr).tolist() == [1, 1, 0]
    assert any("dropped 2 self tie(s)" in m and "line 2" in m for m in s.messages())


def test_zero_weight_lines_are_not_ties() -> None:
    """A weight of 0 drops the line as 'no tie' (counted) and keeps its nodes."""
    edges = parse_edge_list("1,2,3\n2,3,0\n", source="z.csv")
    assert edges.n_ties == 1 and edges.n_units == 3
    assert (edges.summary.n_zero_weight_lines, edges.summary.first_zero_weight_line) == (1, 2)


def test_comments_blank_lines_tabs_and_spaces() -> None:
    """Comment and blank lines are skipped; tab- and space-separated files are read like CSV."""
    csv = parse_edge_list("# survey export\n\n1,2\n\n2,3\n")
    tabs = parse_edge_list("1\t2\n2\t3\n")
    spaces = parse_edge_list("1 2\n2   3\n")
    for other in (tabs, spaces):
        assert (csv.adjacency != other.adjacency).nnz == 0


def test_demo_edge_list_reads_and_is_small() -> None:
    """The Harrow Fen demo file reads, lists some ties in both directions, and stays under 100 kB."""
    path = Path(__file__).resolve().parents[1] / "scenarios" / "harrow_fen_contacts.csv"
    assert path.stat().st_size < 100_000
    edges = read_edge_list(path)
    assert 350 <= edges.n_units <= 450
    assert edges.summary.weighted and edges.summary.n_duplicate_lines > 0
    assert 6 <= 2 * edges.n_ties / edges.n_units <= 10


@pytest.mark.parametrize(
    ("text", "line", "match"),
    [
        ("", 0, "is empty"),
        ("\n# only a comment\n", 0, "is empty"),
        ("source,target\n", 1, "has a header but no ties"),
        ("1,2\n2,x\n", 2, "node id 'x' \\(column 2\\) is not a whole number"),
        ("1,2\n2.5,3\n", 2, "node id '2.5' \\(column 1\\) is not a whole number"),
        ("1,2\n1_000,3\n", 2, "node id '1_000'"),
        ("a,2\n", 1, "node id 'a' \\(column 1\\)"),
        ("1,2,3,4\n", 1, "has 4 column\\(s\\)"),
        ("1\n", 1, "has 1 column\\(s\\)"),
        ("1,2\n2,3,1\n", 2, "has 3 field\\(s\\) but the file has 2 columns"),
        ("1,2,1\n2,3\n", 2, "has 2 field\\(s\\) but the file has 3 columns"),
        ("1,2,1\n2,3,heavy\n", 2, "weight 'heavy' \\(column 3\\) is not a number"),
        ("1,2,1\n2,3,-0.5\n", 2, "weight '-0.5' \\(column 3\\) is negative"),
        ("1,2,nan\n", 1, "is not a finite number"),
        ("h1,h2,w\n1,2,1\n3,4,inf\n", 3, "is not a finite number"),
    ],
)
def test_bad_lines_name_the_file_and_the_line(tmp_path: Path, text: str, line: int, match: str) -> None:
    """Every malformed file gives an EdgeListError (a DesignCalcError) naming the file and, where there is one, the line."""
    path = _write(tmp_path, text, "bad.csv")
    where = f"{path}, line {line}: " if line else f"{path}: "
    with pytest.raises(EdgeListError, match=match) as info:
        read_edge_list(path)
    assert isinstance(info.value, DesignCalcError)
    assert str(info.value).startswith(where)
    assert info.value.line == line and info.value.file == str(path)


def test_unreadable_files_are_user_errors(tmp_path: Path) -> None:
    """A missing file, a folder and a non-UTF-8 file each give one clear EdgeListError naming the path."""
    with pytest.raises(EdgeListError, match="no_such.csv: no such file"):
        read_edge_list(tmp_path / "no_such.csv")
    with pytest.raises(EdgeListError, match="is a folder"):
        read_edge_list(tmp_path)
    latin = _write(tmp_path, "1,2\n2,3 \xe9\n".encode("latin-1"), "latin.csv")
    with pytest.raises(EdgeListError, match="latin.csv, line 2: is not UTF-8 text"):
        read_edge_list(latin)
