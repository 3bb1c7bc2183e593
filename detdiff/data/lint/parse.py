"""Reading COCO record fields for the lint: per-field columns with a status, sections with resolved ids.

Per-field values are pulled out of the record dicts once into numpy arrays, each with a status per
record (:data:`OK`, :data:`ABSENT`, :data:`BAD`), so every rule can work on whole arrays. The type
checks are strict JSON ones: ``bool`` is not a number, ids must fit int64.
"""

from __future__ import annotations

import math
import reprlib
from dataclasses import dataclass
from itertools import chain
from typing import Any

import numpy as np

from detdiff.data.lint.codes import FindingCollector

#: Stands for a key that the record does not have.
MISSING = object()
OK, ABSENT, BAD = 0, 1, 2    # status of one field of one record
_INT64_MIN, _INT64_MAX = -(2 ** 63), 2 ** 63 - 1

_short = reprlib.Repr()
_short.maxstring = _short.maxother = 60
_short.maxlist = _short.maxdict = 6
_short.maxlevel = 3


def one_line(exc: BaseException) -> str:
    """An exception's message with whitespace (newlines) collapsed, at most about 300 characters."""
    text = " ".join(str(exc).split())
    return text if len(text) <= 300 else f"{text[:300]}... ({len(text)} characters)"


def show(value: Any) -> str:
    """A short, printable rendering of a value from the file (type and bounded repr)."""
    if value is MISSING:
        return "nothing"
    return f"{type(value).__name__} {_short.repr(value)}"


def field_values(records: list[dict], key: str) -> list[Any]:
    """``record[key]`` of every record, :data:`MISSING` where it has no such key."""
    return [r.get(key, MISSING) for r in records]


def _int_status(value: Any) -> int:
    if value is MISSING:
        return ABSENT
    return OK if type(value) is int and _INT64_MIN <= value <= _INT64_MAX else BAD


def int_column(values: list[Any]) -> tuple[np.ndarray, np.ndarray]:
    """Integers (not bools) -> (int64 [n], status uint8 [n]); unusable entries hold 0."""
    n = len(values)
    if set(map(type, values)) <= {int}:
        try:
            return np.array(values, dtype=np.int64).reshape(n), np.zeros(n, np.uint8)
        except OverflowError:
            pass
    status = np.array([_int_status(v) for v in values], dtype=np.uint8).reshape(n)
    ints = np.array([v if s == OK else 0 for v, s in zip(values, status.tolist())], dtype=np.int64)
    return ints.reshape(n), status


def to_float(value: int | float) -> float:
    """``float(value)``, with ints beyond the float range as +-infinity."""
    try:
        return float(value)
    except OverflowError:          # an int beyond float range
        return math.inf if value > 0 else -math.inf


def _number_status(value: Any) -> int:
    if value is MISSING:
        return ABSENT
    return OK if type(value) in (int, float) else BAD


def number_column(values: list[Any]) -> tuple[np.ndarray, np.ndarray]:
    """JSON numbers (not bools) -> (float64 [n], status uint8 [n]); unusable entries hold NaN."""
    n = len(values)
    if set(map(type, values)) <= {int, float}:
        try:
            return np.array(values, dtype=np.float64).reshape(n), np.zeros(n, np.uint8)
        except OverflowError:
            pass
    status = np.array([_number_status(v) for v in values], dtype=np.uint8).reshape(n)
    nums = np.array([to_float(v) if s == OK else math.nan for v, s in zip(values, status.tolist())],
                    dtype=np.float64)
    return nums.reshape(n), status


def _box_status(value: Any) -> int:
    if value is MISSING:
        return ABSENT
    ok = type(value) is list and len(value) == 4 and all(type(v) in (int, float) for v in value)
    return OK if ok else BAD


def box_column(values: list[Any]) -> tuple[np.ndarray, np.ndarray]:
    """``[x, y, w, h]`` lists -> (float64 [n, 4], status uint8 [n]); unusable rows hold NaN."""
    n = len(values)
    if set(map(type, values)) <= {list} and set(map(len, values)) <= {4}:
        flat = list(chain.from_iterable(values))
        if set(map(type, flat)) <= {int, float}:
            try:
                return np.array(flat, dtype=np.float64).reshape(n, 4), np.zeros(n, np.uint8)
            except OverflowError:
                pass
    status = np.array([_box_status(v) for v in values], dtype=np.uint8).reshape(n)
    nan_box = [math.nan] * 4
    boxes = [[to_float(x) for x in v] if s == OK else nan_box for v, s in zip(values, status.tolist())]
    return np.array(boxes, dtype=np.float64).reshape(n, 4), status


def str_status(value: Any) -> int:
    """Status of a field that must be a non-empty string."""
    if value is MISSING:
        return ABSENT
    return OK if type(value) is str and value else BAD


@dataclass
class Section:
    """One of images / annotations / categories with its ids resolved."""

    kind: str                   # 'image' | 'annotation' | 'category'
    records: list[dict]         # records that are not objects are replaced by {}
    is_object: np.ndarray       # bool [n]
    ids: np.ndarray             # int64 [n], 0 where id_ok is False
    id_ok: np.ndarray           # bool [n]: an object whose id is an integer fitting int64
    unique_ids: np.ndarray      # int64 [u], sorted distinct usable ids
    first_row: np.ndarray       # int64 [u], row of the first record holding unique_ids[k]
    repeated: np.ndarray        # bool [n]: the id is shared with another record

    def __len__(self) -> int:
        return len(self.records)

    @property
    def kind_article(self) -> str:
        """The record kind with its indefinite article ("an image", "a category")."""
        return f"an {self.kind}" if self.kind[0] in "aeiou" else f"a {self.kind}"

    def record_id(self, row: int) -> tuple[int, bool]:
        """(id, False) for a record with a usable id, else (position, True)."""
        return (int(self.ids[row]), False) if self.id_ok[row] else (row, True)

    def record_label(self, row: int) -> str:
        """How a message names the record: its id, or ``at position N`` without a usable id."""
        record_id, by_position = self.record_id(int(row))
        return f"at position {record_id}" if by_position else str(record_id)

    def lookup(self, query: np.ndarray) -> np.ndarray:
        """Row of the first record with each queried id; -1 where no record has it. int64 [len(query)]."""
        if len(self.unique_ids) == 0:
            return np.full(len(query), -1, dtype=np.int64)
        pos = np.clip(np.searchsorted(self.unique_ids, query), 0, len(self.unique_ids) - 1)
        return np.where(self.unique_ids[pos] == query, self.first_row[pos], -1)


def same_as_previous(equal_to_previous: np.ndarray, n: int) -> np.ndarray:
    """[n - 1] "row k+1 equals row k" -> bool [n] "row equals the one before" (row 0: False)."""
    flags = np.zeros(n, bool)
    flags[1:] = equal_to_previous
    return flags


def read_section(kind: str, raw: list[Any], out: FindingCollector) -> Section:
    """Objects and ids of one section; reports non-objects, bad ids and duplicate ids."""
    is_object = np.fromiter((isinstance(r, dict) for r in raw), dtype=bool, count=len(raw))
    records = raw if is_object.all() else [r if ok else {} for r, ok in zip(raw, is_object.tolist())]
    for row in np.flatnonzero(~is_object).tolist():
        out.add("record_not_object", kind, row, "", f"expected a JSON object, found {show(raw[row])}",
                by_position=True)
    id_values = field_values(records, "id")
    ids, status = int_column(id_values)
    status[~is_object] = OK      # already reported as a whole
    id_ok = is_object & (status == OK)
    section = Section(kind, records, is_object, ids, id_ok, np.zeros(0, np.int64), np.zeros(0, np.int64),
                      np.zeros(len(raw), bool))
    report_status(out, section, "id", id_values, status, "an integer (64-bit)")

    rows = np.flatnonzero(id_ok)
    order = rows[np.argsort(ids[rows], kind="stable")]
    sorted_ids = ids[order]
    again = same_as_previous(sorted_ids[1:] == sorted_ids[:-1], len(sorted_ids))
    group_start = np.maximum.accumulate(np.where(~again, np.arange(len(order)), 0))
    section.unique_ids = sorted_ids[~again]
    section.first_row = order[~again]
    section.repeated = id_ok & np.isin(ids, sorted_ids[again])
    first_of = order[group_start[again]]
    out.add_rows("duplicate_id", section, order[again], "id",
                 (f"expected a unique id, found id {i} again (first used at position {p})"
                  for i, p in zip(sorted_ids[again].tolist(), first_of.tolist())))
    return section


def report_status(out: FindingCollector, section: Section, field_name: str, values: list[Any],
                  status: np.ndarray, expected: str) -> None:
    """missing_key / wrong_type findings for a required field (non-objects are skipped)."""
    absent = np.flatnonzero(section.is_object & (status == ABSENT))
    out.add_rows("missing_key", section, absent, field_name,
                 (f"expected key {field_name!r} ({expected}), found no such key" for _ in absent))
    bad = np.flatnonzero(section.is_object & (status == BAD))
    out.add_rows("wrong_type", section, bad, field_name,
                 (f"expected {field_name!r} to be {expected}, found {show(values[r])}" for r in bad.tolist()))
