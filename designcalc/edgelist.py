"""Reading an observed network from an edge-list CSV file.

One tie per line: two integer node ids and, optionally, a non-negative
weight.  The file may start with a header line (detected: a first line whose
two id fields are both not whole numbers), and may contain blank lines and
``#`` comment lines.  Fields are separated by commas; a file with no comma
on its first line is read as tab- or whitespace-separated.

The network is undirected (METHODS.md §6.3 step 1 symmetrises pilot data):
``a,b`` and ``b,a`` are the same tie.  What the reader does with the lines
that are not plain ties, stated again in the summary it returns:

* a self tie (``a,a``) is dropped, but its node is kept (such lines are how
  some exports list isolates);
* a tie listed more than once (in either direction) is kept once, with the
  **largest** of its weights (a tie reported by both ends is one tie, not a
  tie of double strength);
* a weight of 0 means "no tie": the line is dropped, its nodes are kept.

Node ids are integers because the issue asks for non-numeric ids to be
refused with a clear message; nodes are numbered 0..n-1 in increasing order
of id, and ``EdgeList.ids`` maps an index back to its id.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import scipy as sp

from designcalc.errors import DesignCalcError

__all__ = ["EdgeList", "EdgeListError", "EdgeListSummary", "parse_edge_list", "read_edge_list", "read_edge_list_file"]

# A node id must fit the int64 arrays the reader builds.
_ID_LIMIT = 2**63 - 1
# Plain decimal integers only: Python's int() would also take "1_000".
_INTEGER = re.compile(r"[+-]?[0-9]+")


class EdgeListError(DesignCalcError):
    """An edge-list file is unreadable or a line of it is not a tie.

    Parameters
    ----------
    message
        What is wrong, in plain words.
    file
        The file's name as the user gave it.
    line
        The 1-based line number, or 0 when the problem is the whole file.
    hint
        A suggested fix, when there is one.
    """

    def __init__(self, message: str, *, file: str, line: int = 0, hint: str = "") -> None:
        self.file = file
        self.line = line
        self.reason = message
        self.hint = hint
        where = f"{file}, line {line}" if line else file
        text = f"{where}: {message}"
        if hint:
            text += f"\n  hint: {hint}"
        super().__init__(text)


@dataclass(frozen=True)
class EdgeListSummary:
    """What the reader found besides plain ties, with the first line of each kind (0: none)."""

    source: str
    n_lines: int
    header: tuple[str, ...] | None
    n_ties: int
    n_self_ties: int
    first_self_tie_line: int
    n_duplicate_lines: int
    first_duplicate_line: int
    n_zero_weight_lines: int
    first_zero_weight_line: int
    weighted: bool

    def messages(self) -> list[str]:
        """One sentence per kind of line that was not kept as a new tie, saying what was done."""
        out = []
        if self.n_self_ties:
            out.append(
                f"{self.source}: dropped {self.n_self_ties} self tie(s) (a node linked to itself; first on line "
                f"{self.first_self_tie_line}); their nodes are kept"
            )
        if self.n_duplicate_lines:
            kept = "the largest weight kept" if self.weighted else "kept once"
            out.append(
                f"{self.source}: merged {self.n_duplicate_lines} line(s) repeating a tie already listed, in either "
                f"direction (first on line {self.first_duplicate_line}); each tie {kept}"
            )
        if self.n_zero_weight_lines:
            out.append(
                f"{self.source}: dropped {self.n_zero_weight_lines} line(s) of weight 0 as 'no tie' (first on line "
                f"{self.first_zero_weight_line}); their nodes are kept"
            )
        return out

    def to_dict(self) -> dict[str, object]:
        return {
            "source": self.source,
            "lines": self.n_lines,
            "header": list(self.header) if self.header is not None else None,
            "ties": self.n_ties,
            "self_ties_dropped": self.n_self_ties,
            "first_self_tie_line": self.first_self_tie_line,
            "duplicate_lines_merged": self.n_duplicate_lines,
            "first_duplicate_line": self.first_duplicate_line,
            "zero_weight_lines_dropped": self.n_zero_weight_lines,
            "first_zero_weight_line": self.first_zero_weight_line,
            "weighted": self.weighted,
        }


@dataclass(frozen=True, eq=False)
class EdgeList:
    """An observed undirected network.

    Attributes
    ----------
    adjacency
        Symmetric 0/1 ``scipy.sparse.csr_array`` (float64 data, int32
        indices, sorted, zero diagonal); node i has id ``ids[i]``.
    ids
        The node ids in increasing order (int64).
    weights
        The same pattern as ``adjacency`` holding each tie's weight, or None
        when the file has no weight column.
    summary
        Counts of the lines dropped or merged, with the first line of each.
    """

    adjacency: sp.sparse.csr_array
    ids: np.ndarray
    weights: sp.sparse.csr_array | None
    summary: EdgeListSummary

    @property
    def n_units(self) -> int:
        return int(self.adjacency.shape[0])

    @property
    def n_ties(self) -> int:
        return int(self.adjacency.nnz // 2)


def read_edge_list(path: str | Path) -> EdgeList:
    """Read an edge-list CSV file into an undirected network.

    Parameters
    ----------
    path
        The file: two integer node-id columns and an optional weight column.

    Returns
    -------
    EdgeList

    Raises
    ------
    EdgeListError
        If the file is missing, unreadable, not UTF-8 text, empty, or a line
        has the wrong number of fields, a non-integer id or a negative or
        non-numeric weight.  The message names the file and the line.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> (folder / "ties.csv").write_text("source,target\\n1,2\\n2,3\\n3,2\\n")
    26
    >>> edges = read_edge_list(folder / "ties.csv")
    >>> edges.n_units, edges.n_ties, edges.summary.n_duplicate_lines
    (3, 2, 1)
    """
    return read_edge_list_file(path)[0]


def read_edge_list_file(path: str | Path) -> tuple[EdgeList, bytes]:
    """``read_edge_list`` and the bytes it parsed, for callers that hash or copy exactly what was read (one read)."""
    path = Path(path)
    name = str(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise EdgeListError("no such file", file=name, hint="check the path") from None
    except IsADirectoryError:
        raise EdgeListError("is a folder, not an edge-list file", file=name) from None
    except OSError as exc:
        raise EdgeListError(f"cannot be read: {exc.strerror}", file=name) from None
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise EdgeListError("is not UTF-8 text", file=name, line=line, hint="save the edge list as plain UTF-8 CSV") from None
    return parse_edge_list(text, source=name), raw


def parse_edge_list(text: str, *, source: str = "<edges>") -> EdgeList:
    """Parse the text of an edge-list CSV file (see :func:`read_edge_list` and the module notes).

    Parameters
    ----------
    text
        The file's text.
    source
        The file name quoted in messages.

    Returns
    -------
    EdgeList

    Raises
    ------
    EdgeListError
        As :func:`read_edge_list`.

    Notes
    -----
    One pass over the lines, then one sort of the n_lines tie keys:
    O(lines log lines).

    Examples
    --------
    >>> edges = parse_edge_list("1,2,0.5\\n2,1,2.0\\n3,3,1\\n")
    >>> edges.ids.tolist(), edges.n_ties, edges.weights.toarray()[0].tolist()
    ([1, 2, 3], 1, [0.0, 2.0, 0.0])
    """
    lines = text.splitlines()
    content = [(number, line) for number, line in enumerate(lines, start=1) if line.strip() and not line.lstrip().startswith("#")]
    if not content:
        raise EdgeListError("is empty (no ties)", file=source, hint="give one tie per line: id,id or id,id,weight")
    first_line = content[0][1]
    delimiter: str | None = "," if "," in first_line else ("\t" if "\t" in first_line else None)

    def fields_of(line: str) -> list[str]:
        return [f.strip() for f in (line.split(delimiter) if delimiter is not None else line.split())]

    header: tuple[str, ...] | None = None
    first_number = content[0][0]
    first_fields = fields_of(first_line)
    if len(first_fields) >= 2 and _as_id(first_fields[0]) is None and _as_id(first_fields[1]) is None:
        header = tuple(first_fields)
        content = content[1:]
        if not content:
            raise EdgeListError("has a header but no ties", file=source, line=first_number)
    n_columns = len(first_fields)
    if n_columns not in (2, 3):
        raise EdgeListError(
            f"has {n_columns} column(s); an edge list needs 2 (node id, node id) or 3 (node id, node id, weight)",
            file=source, line=first_number, hint=_separator_hint(delimiter),
        )
    weighted = n_columns == 3

    count = len(content)
    left = np.empty(count, dtype=np.int64)
    right = np.empty(count, dtype=np.int64)
    weight = np.ones(count, dtype=float)
    line_of = np.empty(count, dtype=np.int64)
    for row, (number, line) in enumerate(content):
        fields = fields_of(line)
        if len(fields) != n_columns:
            raise EdgeListError(
                f"has {len(fields)} field(s) but the file has {n_columns} columns "
                f"({'id, id, weight' if weighted else 'id, id'})",
                file=source, line=number, hint=_separator_hint(delimiter),
            )
        for column, target in ((0, left), (1, right)):
            value = _as_id(fields[column])
            if value is None:
                raise EdgeListError(
                    f"node id {fields[column]!r} (column {column + 1}) is not a whole number",
                    file=source, line=number, hint="node ids must be integers; recode text ids as numbers first",
                )
            target[row] = value
        if weighted:
            try:
                w = float(fields[2])
            except ValueError:
                raise EdgeListError(
                    f"weight {fields[2]!r} (column 3) is not a number", file=source, line=number,
                ) from None
            if not math.isfinite(w):
                raise EdgeListError(f"weight {fields[2]!r} (column 3) is not a finite number", file=source, line=number)
            if w < 0:
                raise EdgeListError(
                    f"weight {fields[2]!r} (column 3) is negative; tie weights must be >= 0", file=source, line=number,
                )
            weight[row] = w
        line_of[row] = number

    ids, index = np.unique(np.concatenate([left, right]), return_inverse=True)
    a, b = index[:count], index[count:]
    n = int(ids.size)

    loops = a == b
    zero = ~loops & (weight == 0)
    keep = ~loops & ~zero
    low, high = np.minimum(a, b)[keep], np.maximum(a, b)[keep]
    kept_weight, kept_line = weight[keep], line_of[keep]
    keys = low * n + high
    # Stable sort: the first listing of each tie is its "original"; later ones are the duplicates.
    order = np.argsort(keys, kind="stable")
    keys, kept_weight, kept_line = keys[order], kept_weight[order], kept_line[order]
    starts = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1]]) if keys.size else np.zeros(0, dtype=np.int64)
    repeated_lines = np.delete(kept_line, starts)
    tie_keys = keys[starts]
    tie_weight = np.maximum.reduceat(kept_weight, starts) if keys.size else np.zeros(0)

    rows, cols = tie_keys // n if n else tie_keys, tie_keys % n if n else tie_keys
    adjacency = _symmetric_csr(n, rows, cols, np.ones(tie_keys.size))
    weights = _symmetric_csr(n, rows, cols, tie_weight) if weighted else None
    summary = EdgeListSummary(
        source=source,
        n_lines=len(lines),
        header=header,
        n_ties=int(tie_keys.size),
        n_self_ties=int(loops.sum()),
        first_self_tie_line=int(line_of[loops].min()) if loops.any() else 0,
        n_duplicate_lines=int(repeated_lines.size),
        first_duplicate_line=int(repeated_lines.min()) if repeated_lines.size else 0,
        n_zero_weight_lines=int(zero.sum()),
        first_zero_weight_line=int(line_of[zero].min()) if zero.any() else 0,
        weighted=weighted,
    )
    return EdgeList(adjacency=adjacency, ids=ids.astype(np.int64), weights=weights, summary=summary)


def _as_id(field: str) -> int | None:
    """A whole-number id, or None when the field is not one (``1.0``, ``1e3`` and ``1_000`` are not)."""
    if not _INTEGER.fullmatch(field):
        return None
    value = int(field)
    return value if -_ID_LIMIT <= value <= _ID_LIMIT else None


def _separator_hint(delimiter: str | None) -> str:
    shown = {",": "commas", "\t": "tabs", None: "spaces"}[delimiter]
    return f"fields are read as separated by {shown} (decided from the first line)"


def _symmetric_csr(n: int, rows: np.ndarray, cols: np.ndarray, values: np.ndarray) -> sp.sparse.csr_array:
    """Both orientations of each (row < col) pair, canonical CSR with int32 indices."""
    matrix = sp.sparse.coo_array(
        (np.concatenate([values, values]), (np.concatenate([rows, cols]), np.concatenate([cols, rows]))), shape=(n, n)
    ).tocsr()
    matrix.sort_indices()
    if matrix.nnz >= np.iinfo(np.int32).max:
        raise DesignCalcError(f"the network has {matrix.nnz // 2} ties, more than int32 indices can hold")
    matrix.indices = matrix.indices.astype(np.int32)
    matrix.indptr = matrix.indptr.astype(np.int32)
    return matrix
