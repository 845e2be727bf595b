"""Read the input tables (edges, optional nodes, pairs) into a :class:`Dataset`.

Three tables, each a CSV file (``.csv``, or compressed ``.csv.gz`` /
``.csv.bz2``) or a Parquet file (``.parquet`` / ``.pq``); the suffix decides.

Edge table, one row per edge ``source -> target``:
  ``source``, ``target`` (required): node ids.
  ``relation`` (optional): a text (or integer) label; relation codes follow the
  labels sorted as text, so the same labels give the same codes whatever the
  row order.
  ``weight`` (optional): base weight, a finite number > 0; 1 when absent.
  Every other column is an edge feature and must be numeric.

Node table (optional), one row per node:
  ``node`` (required): a node id, at most once.
  ``teleport`` (optional): teleport weight, a finite number >= 0, not all 0.
  Nodes of the edge table that the node table does not list get teleport
  weight 0. Without a ``teleport`` column the teleport distribution is uniform
  over all nodes. Nodes listed here but absent from the edge table are added
  as isolated (dangling) nodes.

Pair table, one row per preference "preferred ranks above other":
  ``preferred``, ``other`` (required): node ids of the graph, never equal.
  ``weight`` (optional): confidence, a finite number > 0; 1 when absent.
  ``split`` (optional): ``train``, ``valid`` or ``test`` (case and surrounding
  spaces ignored). Without it the pairs are split at random by
  :func:`random_split` with the given seed and fractions (0.7/0.15/0.15).
  Node and pair tables accept no other columns (a typo must not be ignored).

Conventions:
  Rows are counted as a person counts data rows: the header is not a row, the
  first data row is row 1 (blank CSV lines are skipped and not counted). Every
  error is a :class:`fitrank.errors.DataError` naming the file, the row and/or
  column, and the problem.

  Node ids are integers when every id in the edge and node tables is an
  integer column or plain integer text (an optional ``-`` then digits, no
  leading zero, no spaces), and text otherwise; so ``1`` and ``01`` are one
  node only if nothing forces text, and in text mode they are two nodes.
  A missing id (null, empty or blank cell, ``nan``/``NaN``) is an error.
  Node indices 0..n-1 follow first appearance reading the edge table row by
  row, source before target, then the node table's new ids in row order.
  ``Graph.node_ids`` keeps the original ids (int64, or an object array of str).
  Pair ids are looked up as the graph stores them; when one side is text and
  the other integer, both are compared as text.

Policies reported in ``Dataset.notes`` rather than refused:
  Rows with the same (source, target, relation) are merged into one edge: base
  weights are summed and each feature becomes the base-weight-weighted mean of
  the merged rows' features. Self-loops are kept and counted. Pairs repeated
  exactly are kept (each row counts in the loss) and counted; a pair given in
  both directions is kept both ways and counted.

Everything is vectorised (Arrow and NumPy); no Python loop runs over rows.
Label-like columns (ids, relations) are hashed once into codes and their few
distinct values, and checked and converted there; the edge table's ids and its
other columns are worked on in two threads (``experiments/bench_full_solver.py``
measures the whole path against networkx).
"""

from __future__ import annotations

import re
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from fitrank.errors import ConfigError, DataError
from fitrank.graph import SPLITS, Dataset, Graph, Pairs, build_graph

EDGE_COLUMNS = ("source", "target", "relation", "weight")
NODE_COLUMNS = ("node", "teleport")
PAIR_COLUMNS = ("preferred", "other", "weight", "split")
DEFAULT_SPLIT_FRACTIONS = (0.7, 0.15, 0.15)

_CSV_SUFFIXES = (".csv", ".csv.gz", ".csv.bz2")
_PARQUET_SUFFIXES = (".parquet", ".pq")
_PLAIN_INTEGER = r"^(0|-?[1-9][0-9]{0,18})$"
_FEATURE_HINT = "; every extra column of the edge table is an edge feature: drop the column or make it numeric"


# --------------------------------------------------------------------------- public API


def load_dataset(
    edges: str | Path,
    pairs: str | Path,
    nodes: str | Path | None = None,
    *,
    seed: int = 0,
    split_fractions: tuple[float, float, float] = DEFAULT_SPLIT_FRACTIONS,
) -> Dataset:
    """Read the edge, node and pair tables into one validated dataset.

    Args:
      edges: path of the edge table.
      pairs: path of the pair table.
      nodes: path of the optional node table.
      seed: seed of the random train/valid/test split, used only when the pair
        table has no ``split`` column.
      split_fractions: (train, valid, test) fractions of that split, >= 0,
        summing to 1.

    Returns:
      The dataset; ``sources`` maps ``edges``/``nodes``/``pairs`` to the paths
      given (``nodes`` None when absent) and ``notes`` holds the non-fatal
      findings (merged duplicates, self-loops, repeated or contradictory pairs...).

    Raises:
      DataError: a table is missing, unreadable or invalid.
      ConfigError: ``split_fractions`` is invalid.
    """
    _check_fractions(split_fractions)
    notes: list[str] = []
    graph = read_edges(edges, nodes, notes=notes)
    pair_set = read_pairs(pairs, graph, seed=seed, split_fractions=split_fractions, notes=notes)
    sources = {"edges": str(edges), "nodes": None if nodes is None else str(nodes), "pairs": str(pairs)}
    return Dataset(graph=graph, pairs=pair_set, sources=sources, notes=tuple(notes))


def read_edges(edges: str | Path, nodes: str | Path | None = None, *, notes: list[str] | None = None) -> Graph:
    """Read an edge table (and optional node table) into a :class:`Graph`.

    Args:
      edges: path of the edge table.
      nodes: path of the optional node table (teleport weights, isolated nodes).
      notes: if given, non-fatal findings are appended to it as strings.

    Returns:
      The graph (n nodes, E merged edges), edges in CSR target-major order.
    """
    notes = [] if notes is None else notes
    table = _read_table(edges, text_columns=("source", "target", "relation"))
    _require_columns(table, edges, required=("source", "target"))
    num_rows = table.num_rows
    # Two independent halves run side by side (Arrow and NumPy release the GIL on large
    # arrays): node ids here, the other columns on a second thread. Errors still surface in
    # the order of the checks: ids (and the node table) first, then weight, relation, features.
    with ThreadPoolExecutor(max_workers=1) as pool:
        other_columns = pool.submit(_edge_columns, table, edges)
        id_columns = [_id_factors(table, "source", edges), _id_factors(table, "target", edges)]
        node_table = None
        if nodes is not None:
            node_table = _read_table(nodes, text_columns=("node",))
            _require_columns(node_table, nodes, required=("node",), allowed=NODE_COLUMNS)
            id_columns.append(_id_factors(node_table, "node", nodes))
        # Row by row, source before target, then the node table: cell positions 2r, 2r + 1, 2E + r.
        positions = [(2, 0), (2, 1), (1, 2 * num_rows)][: len(id_columns)]
        node_ids, (src, dst, *node_codes), first_position = _number_nodes(id_columns, positions)
        n = len(node_ids)
        base, relation, relation_names, feature_names, features = other_columns.result()

        order, src, dst, relation, starts_triple = _sort_edges(src, dst, relation, n, len(relation_names))
        sorted_features = pool.submit(_gather_rows, features, order)
        base = base[order]
        features = sorted_features.result()
    _refuse_overflowing_out_weight(edges, src, base, order, node_ids)
    merged = num_rows - int(np.count_nonzero(starts_triple))
    if merged:
        src, dst, relation, base, features = _merge_duplicate_edges(src, dst, relation, base, features, starts_triple)
        notes.append(
            f"{edges}: rows repeating an earlier row's (source, target, relation), merged into it "
            f"(base weights summed, features averaged weighted by base weight): {merged}"
        )
    self_loops = int(np.count_nonzero(src == dst))
    if self_loops:
        notes.append(f"{edges}: self-loops (source == target), kept: {self_loops}")

    teleport = None
    if node_table is not None:
        node_codes = node_codes[0]
        _refuse_duplicate_nodes(node_codes, node_ids, nodes)
        isolated = int(np.count_nonzero(first_position >= 2 * num_rows))
        if isolated:
            notes.append(f"{nodes}: nodes without any edge, added as isolated nodes: {isolated}")
        if "teleport" in node_table.column_names:
            teleport = _teleport(node_table, nodes, node_codes, n, notes)
    dangling = int(np.count_nonzero(np.bincount(src, minlength=n) == 0))
    if dangling:
        notes.append(f"{edges}: nodes without an out-edge (dangling): {dangling} of {n}")

    return build_graph(
        src,
        dst,
        n,
        base=base,
        relation=relation,
        relation_names=relation_names,
        features=features,
        feature_names=feature_names,
        node_ids=node_ids,
        teleport=teleport,
    )


def read_pairs(
    path: str | Path,
    graph: Graph,
    *,
    seed: int = 0,
    split_fractions: tuple[float, float, float] = DEFAULT_SPLIT_FRACTIONS,
    notes: list[str] | None = None,
) -> Pairs:
    """Read a pair table whose ids refer to ``graph.node_ids``.

    Args:
      path: path of the pair table.
      graph: the graph the pairs refer to.
      seed, split_fractions: the random split used when there is no ``split`` column.
      notes: if given, non-fatal findings are appended to it as strings.

    Returns:
      The Q pairs in file order.
    """
    _check_fractions(split_fractions)
    notes = [] if notes is None else notes
    table = _read_table(path, text_columns=("preferred", "other", "split"))
    _require_columns(table, path, required=("preferred", "other"), allowed=PAIR_COLUMNS)
    q = table.num_rows
    factors = [_id_factors(table, "preferred", path), _id_factors(table, "other", path)]
    values = _common_id_type([f.values for f in factors])
    graph_ids = pa.array(graph.node_ids)
    preferred, other = (_lookup(ids, graph_ids)[f.codes] for ids, f in zip(values, factors))

    def node(side: int, row: int):
        return values[side][int(factors[side].codes[row])].as_py()

    unknown = (preferred < 0) | (other < 0)
    if unknown.any():
        row = int(unknown.argmax())
        side = 0 if preferred[row] < 0 else 1
        raise DataError(
            path,
            f"unknown node {node(side, row)!r}: it is in neither the edge nor the node table",
            row + 1,
            PAIR_COLUMNS[side],
        )
    _raise_first(path, preferred == other, lambda r: f"preferred and other are the same node {node(0, r)!r}")

    weight = np.ones(q)
    if "weight" in table.column_names:
        weight = _numbers(table, "weight", path)
        _require_positive(weight, path, "weight")
        weight = _with_finite_sum(weight, path, "weight", notes)
    if "split" in table.column_names:
        split = _split_codes(table, path)
    else:
        split = random_split(q, seed, split_fractions)
        notes.append(
            f"{path}: no split column; pairs split at random (seed {seed}, fractions "
            f"{'/'.join(f'{f:g}' for f in split_fractions)})"
        )
    _pair_notes(path, preferred, other, split, graph.n, notes)
    return Pairs(preferred=preferred, other=other, weight=weight, split=split)


def random_split(
    num_pairs: int, seed: int, fractions: tuple[float, float, float] = DEFAULT_SPLIT_FRACTIONS
) -> np.ndarray:
    """A reproducible random train/valid/test assignment.

    The counts are ``fractions * num_pairs`` rounded by the largest-remainder
    rule (common practice: they sum to ``num_pairs`` and each is within 1 of its
    target); ties between equal remainders go to the earlier split. The
    pairs given to each split are chosen by a permutation drawn from
    ``numpy.random.default_rng(seed)``.

    Args:
      num_pairs: Q, the number of pairs.
      seed: the random seed.
      fractions: (train, valid, test) fractions, >= 0, summing to 1.

    Returns:
      (Q,) int8 positions in :data:`fitrank.graph.SPLITS`.
    """
    _check_fractions(fractions)
    share = np.asarray(fractions, dtype=np.float64)
    target = share / share.sum() * num_pairs  # the sum may miss 1 by rounding
    counts = np.floor(target).astype(np.int64)
    short = num_pairs - int(counts.sum())
    counts[np.argsort(-(target - counts), kind="stable")[:short]] += 1
    split = np.empty(num_pairs, dtype=np.int8)
    split[np.random.default_rng(seed).permutation(num_pairs)] = np.repeat(np.arange(3, dtype=np.int8), counts)
    return split


# --------------------------------------------------------------------------- reading


def _read_table(path: str | Path, text_columns: tuple[str, ...]) -> pa.Table:
    """Read a CSV or Parquet file; in CSV the ``text_columns`` keep their text."""
    name = Path(path).name.lower()
    if name.endswith(_PARQUET_SUFFIXES):
        kind = "Parquet"
    elif name.endswith(_CSV_SUFFIXES):
        kind = "CSV"
    else:
        raise DataError(path, "unknown table format: the file name must end in .csv, .csv.gz, .csv.bz2, .parquet or .pq")
    file = Path(path)
    if not file.exists():
        raise DataError(path, "no such file")
    if not file.is_file():
        raise DataError(path, "not a regular file")
    try:
        table = _read_csv(file, text_columns) if kind == "CSV" else _read_parquet(file, text_columns)
        names = table.column_names
    except (pa.ArrowException, OSError, UnicodeDecodeError) as err:  # the last: a header that is not UTF-8
        message = _first_line(err)
        row = None
        if kind == "CSV":
            not_text = _not_csv_text(file)
            if not_text is not None:
                raise DataError(path, not_text[1], not_text[0]) from None
            if "Empty CSV file" in message:
                raise DataError(path, "the file is empty (no header row)") from None
            if "CSV parse error" in message:
                row, message = _csv_error_row(file, text_columns, message)
        raise DataError(path, f"cannot read as {kind}: {message}", row) from None
    repeated = [c for i, c in enumerate(names) if c in names[:i]]
    if repeated:
        raise DataError(path, "the column name appears twice in the header" + _header_hint(names), column=repeated[0])
    if table.num_rows == 0:
        raise DataError(path, "the table has no data rows")
    return table


def _first_line(err: BaseException) -> str:
    return (str(err).strip().splitlines() or [type(err).__name__])[0]


# Text columns that hold a few distinct values (labels, not ids).
_FEW_VALUES = ("relation", "split")


def _read_csv(file: Path, text_columns: tuple[str, ...], use_threads: bool = True) -> pa.Table:
    # The CSV reader builds one dictionary per block of the file: cheap for a column of a few
    # labels (no string column is built at all), but for ids, merging tens of large dictionaries
    # costs more than encoding one string column once (_factorise).
    types = {c: pa.dictionary(pa.int32(), pa.string()) if c in _FEW_VALUES else pa.string() for c in text_columns}
    return pacsv.read_csv(
        file,
        read_options=pacsv.ReadOptions(use_threads=use_threads),
        convert_options=pacsv.ConvertOptions(column_types=types),
    )


def _read_parquet(file: Path, text_columns: tuple[str, ...]) -> pa.Table:
    # Parquet stores text dictionary-encoded: reading it so skips building the strings and
    # hashing them again. read_dictionary touches only text (byte-array) columns.
    # ParquetFile rather than read_table: one file needs none of the dataset machinery.
    with pq.ParquetFile(file) as parquet:
        names = parquet.schema_arrow.names
    with pq.ParquetFile(file, read_dictionary=[c for c in text_columns if c in names]) as parquet:
        return parquet.read()


def _csv_error_row(file: Path, text_columns: tuple[str, ...], message: str) -> tuple[int | None, str]:
    """The data row of a CSV parse error, and the message without Arrow's row prefix.

    Arrow numbers the offending row only when it parses on one thread; its
    "Row #N" counts the header as row 1 and skips blank lines.
    """
    try:
        _read_csv(file, text_columns, use_threads=False)
    except (pa.ArrowException, OSError) as err:
        found = re.search(r"Row #(\d+): ", str(err))
        if found:
            header_row = 1
            return int(found.group(1)) - header_row, str(err)[found.end() :].splitlines()[0]
    return None, message


def _not_csv_text(file: Path) -> tuple[int | None, str] | None:
    """(data row or None, problem) when a CSV file that Arrow refused is not UTF-8 text at all; else None.

    Arrow's own messages then print raw bytes or a column number only.
    """
    try:
        with pa.input_stream(str(file), compression="detect") as stream:
            data = stream.read()
    except (pa.ArrowException, OSError) as err:  # a damaged or mislabelled .gz / .bz2
        return None, f"cannot be decompressed ({_first_line(err)}); the file is damaged or not what its name says"
    if data[:4] == b"PAR1":
        return None, "this is a Parquet file, not CSV text; give it a .parquet name"
    if data[:2] in (b"\xff\xfe", b"\xfe\xff"):
        return None, "this is UTF-16 text; save the file as UTF-8"
    if b"\x00" in data[:65536]:
        return None, "not a text file (it holds NUL bytes); give a CSV or Parquet table"
    row = -1  # the header is row 0; blank lines are not rows (as for Arrow)
    for line in data.splitlines():  # \n, \r\n and \r alike
        if not line.strip():
            continue
        row += 1
        try:
            line.decode("utf-8")
        except UnicodeDecodeError:
            return (row or None), f"{'the header' if row == 0 else 'this row'} is not UTF-8 text; save the file as UTF-8"
    return None


def _header_hint(names: list[str]) -> str:
    """A hint when the header row looks like data: numbers as column names mean it is missing."""
    if any(_looks_numeric(name) for name in names):
        return "; the first line is read as the header and holds numbers: does the file lack a header row?"
    return ""


def _looks_numeric(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _require_columns(
    table: pa.Table, path: str | Path, required: tuple[str, ...], allowed: tuple[str, ...] | None = None
) -> None:
    names = table.column_names
    for column in required:
        if column not in names:
            found = ", ".join(repr(c) for c in names)
            raise DataError(path, f"missing required column '{column}' (the table has {found}){_header_hint(names)}")
    for column in names if allowed is not None else ():
        if column not in allowed:
            raise DataError(path, f"unexpected column; this table takes only {', '.join(allowed)}", column=column)


def _raise_first(path: str | Path, bad: np.ndarray, problem: Callable[[int], str], column: str | None = None) -> None:
    """Raise a DataError at the first row where ``bad`` (rows,) is true, if any."""
    if bad.any():
        row = int(bad.argmax())
        raise DataError(path, problem(row), row + 1, column)


def _plain(column: pa.ChunkedArray) -> pa.Array:
    """One contiguous array, dictionary (categorical) columns decoded."""
    array = column.combine_chunks()
    if pa.types.is_dictionary(array.type):
        array = array.dictionary_decode()
    return array


def _is_text(array: pa.Array) -> bool:
    return pa.types.is_string(array.type) or pa.types.is_large_string(array.type)


def _missing_text(array: pa.Array) -> np.ndarray:
    """(rows,) bool: null, empty or blank, or nan/NaN (how tables spell a missing value)."""
    trimmed = pc.utf8_trim_whitespace(array)
    missing = pc.or_(pc.equal(trimmed, ""), pc.equal(pc.utf8_lower(trimmed), "nan"))
    return pc.fill_null(missing, True).to_numpy(zero_copy_only=False)


_BLOCK = 1 << 16  # rows per block where a loop over blocks saves large temporaries


@dataclass(frozen=True)
class _Factors:
    """A column as codes into its distinct values.

    Attributes:
      codes: (rows,) integer position of each cell's value in ``values``; -1 for a null cell.
      values: (K,) the non-null values, each used by at least one cell; distinct, except
        that a value repeated in a file's own dictionary may stay repeated.
      first_null: 0-based row of the first null cell, or None.
    """

    codes: np.ndarray
    values: pa.Array
    first_null: int | None

    @cached_property
    def first_row(self) -> np.ndarray:
        """(K,) int64 0-based row where each value first appears."""
        rows = self.codes.shape[0]
        first = np.full(len(self.values), rows, dtype=np.int64)
        # Block by block: one (rows,) array of row numbers would cost more (page faults) than the loop.
        block = np.arange(min(rows, _BLOCK))
        for start in range(0, rows, _BLOCK):
            codes = self.codes[start : start + _BLOCK]
            cells = block[: codes.shape[0]] + start
            if self.first_null is not None:
                valid = codes >= 0
                codes, cells = codes[valid], cells[valid]
            np.minimum.at(first, codes, cells)
        return first

    def first_row_of(self, bad: np.ndarray, nulls_too: bool = False) -> int | None:
        """The first 0-based row whose value is flagged in ``bad`` (K,) (or, with ``nulls_too``, is null)."""
        rows = [int(self.first_row[bad].min())] if bad.any() else []
        if nulls_too and self.first_null is not None:
            rows.append(self.first_null)
        return min(rows) if rows else None


def _factorise(column: pa.ChunkedArray) -> _Factors:
    """Split a column into codes and distinct values with one hash pass over the cells.

    Validation and conversion then run on the K distinct values instead of on
    every cell: for node ids and relation labels K is far smaller than the row count.
    """
    if not pa.types.is_dictionary(column.type):
        # One array first: encoding chunk by chunk would give each chunk its own dictionary.
        encoded = pc.dictionary_encode(column.combine_chunks())
        codes = pc.fill_null(encoded.indices, -1).to_numpy(zero_copy_only=False)
        # The encoder's values are distinct, non-null, each used, in order of first appearance.
        null = codes < 0
        return _Factors(codes, encoded.dictionary, int(null.argmax()) if null.any() else None)

    # A dictionary column read from a file: the chunks of one Parquet row group share one
    # dictionary. Hash each distinct dictionary once (not every chunk's: tens of chunks can
    # repeat a large one), and make the values non-null and used: a file's dictionary may
    # hold a null or values no cell uses (or repeat a value: see below).
    dictionaries, which = [], []
    for chunk in column.chunks:
        if not dictionaries or not chunk.dictionary.equals(dictionaries[-1]):
            dictionaries.append(chunk.dictionary)
        which.append(len(dictionaries) - 1)
    if len(dictionaries) == 1 and not dictionaries[0].null_count:
        # One dictionary, no null in it: keep it as it is. A repeated value stays two codes;
        # the consumers that need distinct values merge them (_number_nodes, _relations).
        values = dictionaries[0]
        remap = np.arange(len(values))
    else:
        merged = pc.dictionary_encode(pa.concat_arrays(dictionaries))
        values = merged.dictionary
        remap = pc.fill_null(merged.indices, -1).to_numpy(zero_copy_only=False)
    code_type = np.int32 if len(values) < 2**31 else np.int64
    offsets = np.cumsum([0] + [len(d) for d in dictionaries])
    # Per dictionary: its entries' codes, then -1, which a null cell's index -1 picks.
    lookups = [np.append(remap[lo:hi], -1).astype(code_type) for lo, hi in zip(offsets[:-1], offsets[1:])]
    plain = [np.array_equal(lookup[:-1], np.arange(lookup.shape[0] - 1)) for lookup in lookups]
    codes = np.empty(len(column), dtype=code_type)
    start = 0
    for chunk, d in zip(column.chunks, which):
        indices = chunk.indices
        indices = (pc.fill_null(indices, -1) if indices.null_count else indices).to_numpy(zero_copy_only=False)
        if plain[d] and not chunk.null_count:
            codes[start : start + len(chunk)] = indices  # the usual case: a copy, no lookup
        else:
            np.take(lookups[d], indices, out=codes[start : start + len(chunk)])
        start += len(chunk)
    null = codes < 0
    used = np.zeros(len(values), dtype=bool)
    used[codes[~null] if null.any() else codes] = True
    if not used.all():  # values no cell uses must not become nodes or labels
        position = (np.cumsum(used) - 1).astype(code_type)
        codes = np.where(null, code_type(-1), position[codes])
        values = values.filter(pa.array(used))
    return _Factors(codes, values, int(null.argmax()) if null.any() else None)


def _raise_at(path: str | Path, row: int | None, problem: str, column: str | None = None) -> None:
    """Raise a DataError at 0-based ``row`` unless it is None."""
    if row is not None:
        raise DataError(path, problem, row + 1, column)


def _id_factors(table: pa.Table, column: str, path: str | Path) -> _Factors:
    """The node ids of one column, checked, as codes into int64 or large_string values."""
    ids = _factorise(table.column(column))
    values = ids.values
    if pa.types.is_integer(values.type):
        _raise_at(path, ids.first_null, "missing node id", column)
        try:
            values = values.cast(pa.int64())
        except pa.ArrowInvalid:
            raise DataError(path, "node ids do not fit a 64-bit signed integer", column=column) from None
    elif pa.types.is_floating(values.type):
        numbers = values.cast(pa.float64()).to_numpy(zero_copy_only=False)
        _raise_at(path, ids.first_row_of(np.isnan(numbers), nulls_too=True), "missing node id", column)
        bad = ~np.isfinite(numbers) | (numbers != np.round(numbers)) | (np.abs(numbers) >= 2.0**63)
        row = ids.first_row_of(bad)
        if row is not None:
            value = float(numbers[ids.codes[row]])
            raise DataError(path, f"node id {value!r} is not an integer; ids must be integers or text", row + 1, column)
        values = pa.array(numbers.astype(np.int64))
    elif _is_text(values):
        values = values.cast(pa.large_string())
        row = ids.first_row_of(_missing_text(values), nulls_too=True)
        _raise_at(path, row, "missing node id (empty cell or NaN)", column)
    else:
        raise DataError(path, f"node ids must be integers or text, not {values.type}", column=column)
    return _Factors(ids.codes, values, ids.first_null)


def _number_nodes(
    columns: list[_Factors], positions: list[tuple[int, int]]
) -> tuple[np.ndarray, list[np.ndarray], np.ndarray]:
    """Node indices 0..n-1 in order of first appearance over several id columns.

    Args:
      columns: the checked id columns (no null cell); their values are brought
        to one type by :func:`_common_id_type`.
      positions: per column (stride, offset): row r of that column is read at
        position ``stride * r + offset``, positions distinct over all cells.

    Returns:
      node_ids (n,) (int64, or object array of str), per column the (rows,)
      int64 node index of each cell, and (n,) the position where each node is first read.
    """
    values = _common_id_type([c.values for c in columns])
    union = pc.dictionary_encode(pa.concat_arrays(values))
    slot = union.indices.to_numpy(zero_copy_only=False).astype(np.int64)
    first = np.full(len(union.dictionary), np.iinfo(np.int64).max)
    bounds = np.cumsum([0] + [len(v) for v in values])
    for c, (stride, offset), lo, hi in zip(columns, positions, bounds[:-1], bounds[1:]):
        np.minimum.at(first, slot[lo:hi], c.first_row * stride + offset)
    order = np.argsort(first)
    rank = np.empty_like(order)
    rank[order] = np.arange(order.shape[0])
    node_ids = union.dictionary.take(pa.array(order)).to_numpy(zero_copy_only=False)
    codes = [rank[slot[lo:hi]][c.codes] for c, lo, hi in zip(columns, bounds[:-1], bounds[1:])]
    return node_ids, codes, first[order]


def _canonical_ints(array: pa.Array) -> pa.Array | None:
    """The int64 values of a text array if every entry is plain integer text, else None."""
    # Checked by pattern first: a failing cast is slow, and the cast accepts "01", which must stay text.
    # A few leading values first: text ids usually fail there, without a pass over all values.
    for part in (array.slice(0, 64), array):
        if not pc.all(pc.match_substring_regex(part, _PLAIN_INTEGER)).as_py():
            return None
    try:
        return array.cast(pa.int64())
    except pa.ArrowInvalid:  # 19 digits beyond the int64 range
        return None


def _common_id_type(columns: list[pa.Array]) -> list[pa.Array]:
    """All int64 if every column is integer or plain integer text; else all large_string."""
    as_ints = [c if pa.types.is_integer(c.type) else _canonical_ints(c) for c in columns]
    if all(a is not None for a in as_ints):
        return as_ints
    return [c.cast(pa.large_string()) for c in columns]


def _lookup(ids: pa.Array, node_ids: pa.Array) -> np.ndarray:
    """(len(ids),) int64 position of each id in ``node_ids``, -1 where absent."""
    if pa.types.is_integer(ids.type) and pa.types.is_integer(node_ids.type):
        ids, node_ids = ids.cast(pa.int64()), node_ids.cast(pa.int64())
    else:
        ids, node_ids = ids.cast(pa.large_string()), node_ids.cast(pa.large_string())
    index = pc.index_in(ids, value_set=node_ids)
    return pc.fill_null(index, -1).to_numpy(zero_copy_only=False).astype(np.int64)


def _numbers(table: pa.Table, column: str, path: str | Path, hint: str = "") -> np.ndarray:
    """(rows,) float64 values of a numeric column, NaN where a cell is empty."""
    array = table.column(column)
    if pa.types.is_dictionary(array.type):
        array = _plain(array)
    kind = array.type
    if pa.types.is_integer(kind) or pa.types.is_floating(kind) or pa.types.is_boolean(kind) or pa.types.is_decimal(kind):
        # Straight from the chunks: one copy at most (none for one float64 chunk without nulls).
        return array.cast(pa.float64()).to_numpy(zero_copy_only=False)
    array = _plain(array)
    if _is_text(array):
        text = pd.Series(array.to_numpy(zero_copy_only=False), dtype=object)
        values = pd.to_numeric(text, errors="coerce").to_numpy(dtype=np.float64)
        not_number = np.isnan(values) & ~_missing_text(array)
        _raise_first(path, not_number, lambda r: f"{text.iat[r]!r} is not a number{hint}", column)
        return values  # Arrow's parser refused a spelling pandas reads; keep pandas' reading
    raise DataError(path, f"values of type {kind} are not numbers{hint}", column=column)


def _require_positive(values: np.ndarray, path: str | Path, column: str, allow_zero: bool = False) -> None:
    ok = np.isfinite(values) & ((values >= 0) if allow_zero else (values > 0))
    bound = ">= 0" if allow_zero else "> 0"
    _raise_first(path, ~ok, lambda r: f"{column} must be a finite number {bound}, got {float(values[r])!r}", column)


def _with_finite_sum(values: np.ndarray, path: str | Path, column: str, notes: list[str]) -> np.ndarray:
    """``values`` (finite, >= 0), divided by their largest when they would sum beyond the float range.

    They count only relative to their sum, which would otherwise turn every
    one of them into 0 or NaN; the common factor changes nothing else.
    """
    with np.errstate(over="ignore"):
        total = values.sum()
    if np.isfinite(total):
        return values
    notes.append(f"{path}: column {column} divided by its largest value {values.max():.3g}, so that it sums "
                 "within the float range (only ratios count)")
    return values / values.max()


# --------------------------------------------------------------------------- edge table


def _edge_columns(
    table: pa.Table, path: str | Path
) -> tuple[np.ndarray, np.ndarray, tuple[str, ...], tuple[str, ...], np.ndarray]:
    """The edge table's columns other than the ids, checked, in file order.

    Returns:
      base (E,) float64, relation (E,) int64 codes, the relation labels, the
      feature names (f,) and the (E, f) float64 feature matrix.
    """
    num_rows = table.num_rows
    if "weight" in table.column_names:
        base = _numbers(table, "weight", path)
        _require_positive(base, path, "weight")
    else:
        base = np.ones(num_rows)
    relation, relation_names = np.zeros(num_rows, dtype=np.int64), ("",)
    if "relation" in table.column_names:
        relation, relation_names = _relations(table, path)
    feature_names = tuple(c for c in table.column_names if c not in EDGE_COLUMNS)
    return base, relation, relation_names, feature_names, _features(table, path, feature_names)


def _relations(table: pa.Table, path: str | Path) -> tuple[np.ndarray, tuple[str, ...]]:
    """(E,) int64 relation codes and the labels, sorted as text, they index."""
    labels = _factorise(table.column("relation"))
    if not (pa.types.is_integer(labels.values.type) or _is_text(labels.values)):
        raise DataError(path, f"relation labels must be text or integers, not {labels.values.type}", column="relation")
    text = labels.values.cast(pa.large_string())
    _raise_at(path, labels.first_row_of(_missing_text(text), nulls_too=True), "missing relation label", "relation")
    names, slot = np.unique(np.array(text.to_pylist(), dtype=object), return_inverse=True)  # sorted as text
    return slot.astype(np.int64)[labels.codes], tuple(names)


def _features(table: pa.Table, path: str | Path, names: tuple[str, ...]) -> np.ndarray:
    """(E, f) float64 feature matrix, in file order; refuses non-numeric columns and NaN/inf values."""
    columns = [_numbers(table, name, path, hint=_FEATURE_HINT) for name in names]
    # Checked column by column: no (E, f) temporaries before the one matrix.
    bad_rows = [int(bad.argmax()) if bad.any() else table.num_rows for bad in (~np.isfinite(c) for c in columns)]
    if columns and min(bad_rows) < table.num_rows:
        row = min(bad_rows)
        col = bad_rows.index(row)  # the first bad column in the first bad row
        raise DataError(path, f"feature value {float(columns[col][row])!r} is not a finite number", row + 1, names[col])
    return np.column_stack(columns) if columns else np.zeros((table.num_rows, 0))


def _gather_rows(matrix: np.ndarray, order: np.ndarray) -> np.ndarray:
    """(E, f) C-ordered matrix whose row i is row ``order[i]`` of ``matrix`` (E, f)."""
    out = np.empty((order.shape[0], matrix.shape[1]))
    # mode="clip" skips the bounds check and its buffer: order is a permutation, nothing is clipped.
    np.take(matrix, order, axis=0, out=out, mode="clip")
    return out


def _sorted_fields(fields: list[tuple[np.ndarray, int]], index_bits: int) -> tuple[np.ndarray, np.ndarray]:
    """A stable sort of the rows by integer bit fields, the row index packed below them.

    One plain sort of (E,) uint64 words: much faster than an argsort, and rows
    with equal fields keep their order.

    Args:
      fields: (values (E,) >= 0, bits) pairs, most significant first; each
        field's values below 2**bits, the bits of all fields plus ``index_bits`` <= 64.
      index_bits: bits of the row index, (E - 1).bit_length().

    Returns:
      order (E,) int64 permutation of the rows; the sorted (E,) uint64 words
      with the row index shifted out.
    """
    packed = fields[0][0].astype(np.uint64)  # in place from here: every temporary of E words costs page faults
    for field, bits in fields[1:] + [(np.arange(packed.shape[0]), index_bits)]:
        packed <<= np.uint64(bits)
        packed |= np.asarray(field, dtype=np.int64).view(np.uint64)  # values are >= 0: the same bits
    packed.sort()
    order = np.bitwise_and(packed, np.uint64((1 << index_bits) - 1)).view(np.int64)
    packed >>= np.uint64(index_bits)
    return order, packed


def _sort_edges(
    src: np.ndarray, dst: np.ndarray, relation: np.ndarray, n: int, num_relations: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Sort the edges by (dst, src, relation), stably, and find where each triple starts.

    Args:
      src, dst: (E,) int64 node indices in [0, n).
      relation: (E,) int64 relation codes in [0, num_relations).

    Returns:
      order (E,) int64 permutation of the rows; src, dst, relation (E,) int64
      in that order; starts (E,) bool, True where the sorted row's triple
      differs from the row before (always True at 0).
    """
    rows = src.shape[0]
    node_bits, relation_bits, index_bits = (n - 1).bit_length(), (num_relations - 1).bit_length(), (rows - 1).bit_length()
    starts = np.ones(rows, dtype=bool)
    if node_bits + relation_bits + index_bits > 64:  # n beyond any graph held in memory: plain lexsort
        order = np.lexsort((relation, src, dst))
        src, dst, relation = src[order], dst[order], relation[order]
        starts[1:] = (dst[1:] != dst[:-1]) | (src[1:] != src[:-1]) | (relation[1:] != relation[:-1])
        return order, src, dst, relation, starts
    low_bits = node_bits + relation_bits  # (src, relation) as one field
    if low_bits + node_bits + index_bits <= 64:  # the whole triple in one word
        order, key = _sorted_fields([(dst, 0), (src, node_bits), (relation, relation_bits)], index_bits)
        high = key >> np.uint64(low_bits)
        low = np.bitwise_and(key, np.uint64((1 << low_bits) - 1), out=key)
    else:  # two stable sorts, least significant field first (a two-digit radix sort)
        by_low, low = _sorted_fields([(src, 0), (relation, relation_bits)], index_bits)
        position, high = _sorted_fields([(dst[by_low], 0)], index_bits)
        order, low = by_low[position], low[position]
    # The sorted src, dst and relation come out of the fields, not from three random gathers.
    np.not_equal(high[1:], high[:-1], out=starts[1:])
    starts[1:] |= low[1:] != low[:-1]
    relation = np.bitwise_and(low, np.uint64((1 << relation_bits) - 1)).view(np.int64)
    src = (low >> np.uint64(relation_bits)).view(np.int64)
    return order, src, high.view(np.int64), relation, starts


def _merge_duplicate_edges(
    src: np.ndarray,
    dst: np.ndarray,
    relation: np.ndarray,
    base: np.ndarray,
    features: np.ndarray,
    starts: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Merge the sorted rows of each (source, target, relation) triple into one edge.

    Args:
      src, dst, relation, base: (E,) rows sorted by :func:`_sort_edges`.
      features: (E, f) in the same order.
      starts: (E,) bool, True where a new triple starts.

    Returns:
      src, dst, relation, base (E',) and features (E', f). Merged base weights
      are summed; merged features are base-weight-weighted means, kept within
      the merged rows' range. Features that agree on every merged row keep
      their value bit for bit, as does an unmerged edge: a rounded mean of
      equal values would turn a constant column into one that varies by
      rounding, which standardising would blow up to unit spread.
    """
    first = np.flatnonzero(starts)
    sizes = np.diff(np.append(first, starts.shape[0]))
    summed = np.add.reduceat(base, first)
    merged_features = features[first]
    groups = sizes > 1
    if features.shape[1] and groups.any():
        # each row's share of its group's weight, formed without products near the float range (weights
        # up to 1.8e308 are valid): the mean of finite features then stays finite
        relative = base / np.repeat(np.maximum.reduceat(base, first), sizes)
        share = relative / np.repeat(np.add.reduceat(relative, first), sizes)
        weighted = np.add.reduceat(features * share[:, None], first, axis=0)
        low, high = np.minimum.reduceat(features, first, axis=0), np.maximum.reduceat(features, first, axis=0)
        mean = np.where(low == high, features[first], np.clip(weighted, low, high))
        merged_features[groups] = mean[groups]
    return src[first], dst[first], relation[first], summed, merged_features


def _refuse_overflowing_out_weight(
    path: str | Path, src: np.ndarray, base: np.ndarray, order: np.ndarray, node_ids: np.ndarray
) -> None:
    """Raise when a node's base weights sum beyond the float range (merged rows sum too).

    Every weighting divides by such sums, and an infinite one turns the node's walk
    into 0 or NaN. Only the sums matter relative to each other, so the fix is one factor.

    Args:
      src, base: (E,) rows sorted by :func:`_sort_edges`; order (E,) their file rows.
    """
    with np.errstate(over="ignore"):  # the overflow is what is looked for, not news for stderr
        if np.isfinite(base.sum()):  # one cheap pass: no node's share can overflow then
            return
        overflow = ~np.isfinite(np.bincount(src, weights=base, minlength=node_ids.shape[0]))
    if not overflow.any():  # only the total overflows, which nothing uses
        return
    node = int(overflow.argmax())
    row = int(order[src == node].min())
    raise DataError(
        path,
        f"the weights of node {_node_label(node_ids, node)!r}'s out-edges sum beyond the largest float "
        "(1.8e308); divide the whole weight column by one common factor (the ranking does not change)",
        row + 1,
        "weight",
    )


def _node_label(node_ids: np.ndarray, index: int):
    """The original id of node ``index`` as a plain Python int or str, for messages."""
    node = node_ids[index]
    return node.item() if isinstance(node, np.generic) else node


# --------------------------------------------------------------------------- node table


def _refuse_duplicate_nodes(codes: np.ndarray, node_ids: np.ndarray, path: str | Path) -> None:
    """Raise at the first node-table row whose node an earlier row already listed."""
    _, first = np.unique(codes, return_index=True)
    first_row_of = np.empty(node_ids.shape[0], dtype=np.int64)
    first_row_of[codes[first]] = first

    def problem(row: int) -> str:
        node = _node_label(node_ids, codes[row])
        return f"node {node!r} is listed twice (first at row {first_row_of[codes[row]] + 1})"

    _raise_first(path, first_row_of[codes] != np.arange(codes.shape[0]), problem, "node")


def _teleport(table: pa.Table, path: str | Path, codes: np.ndarray, n: int, notes: list[str]) -> np.ndarray:
    """(n,) teleport weights from the node table; unlisted nodes get 0."""
    values = _numbers(table, "teleport", path)
    _require_positive(values, path, "teleport", allow_zero=True)
    values = _with_finite_sum(values, path, "teleport", notes)
    if not (values > 0).any():
        raise DataError(path, "every teleport weight is 0; at least one must be > 0", column="teleport")
    teleport = np.zeros(n)
    teleport[codes] = values
    unlisted = n - codes.shape[0]
    if unlisted:
        notes.append(f"{path}: nodes not listed here, given teleport weight 0: {unlisted}")
    return teleport


# --------------------------------------------------------------------------- pair table


def _check_fractions(fractions) -> None:
    values = np.asarray(fractions, dtype=np.float64)
    if values.shape != (3,) or not np.all(np.isfinite(values)) or np.any(values < 0) or abs(values.sum() - 1) > 1e-9:
        raise ConfigError(
            "split_fractions", f"must be three numbers >= 0 (train, valid, test) summing to 1, got {fractions!r}"
        )


def _split_codes(table: pa.Table, path: str | Path) -> np.ndarray:
    """(Q,) int8 split positions from the ``split`` column."""
    array = _plain(table.column("split"))
    if not _is_text(array):
        raise DataError(path, f"split must be text (train, valid or test), not {array.type}", column="split")
    normal = pc.utf8_lower(pc.utf8_trim_whitespace(array.cast(pa.large_string())))
    codes = _lookup(normal, pa.array(SPLITS, type=pa.large_string()))

    def problem(row: int) -> str:
        value = array[row].as_py()
        return f"unknown split {'(empty cell)' if value is None else repr(value)}; use train, valid or test"

    _raise_first(path, codes < 0, problem, "split")
    return codes.astype(np.int8)


def _pair_notes(
    path: str | Path, preferred: np.ndarray, other: np.ndarray, split: np.ndarray, n: int, notes: list[str]
) -> None:
    """Count repeated pairs, pairs given both ways, and empty splits."""
    keys = np.unique(preferred * n + other)
    repeated = preferred.shape[0] - keys.shape[0]
    if repeated:
        notes.append(f"{path}: rows repeating an earlier (preferred, other) pair, all kept: {repeated}")
    reversed_keys = (keys % n) * n + keys // n
    both_ways = int(np.count_nonzero(np.isin(reversed_keys, keys))) // 2
    if both_ways:
        notes.append(f"{path}: node pairs given in both directions (contradictory), all rows kept: {both_ways}")
    counts = np.bincount(split, minlength=len(SPLITS))
    empty = [name for name, count in zip(SPLITS, counts) if count == 0]
    if empty:
        notes.append(f"{path}: no pairs in split {', '.join(empty)}")
