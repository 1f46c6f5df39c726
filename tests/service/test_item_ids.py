"""ItemIds against the structure it replaces: a list of ids and a dict from id to row
(Python's own list and dict are the reference)."""

from __future__ import annotations

import numpy as np

from leadline.service.engine.item_ids import ItemIds


class _SameHash(str):
    """An id whose hash collides with every other such id: forces the text comparison."""

    __slots__ = ()

    def __hash__(self) -> int:
        return 42


def test_rows_and_ids_match_a_list_and_a_dict() -> None:
    rng = np.random.default_rng(3)
    ids = ItemIds()
    reference: list[str] = []
    alphabet = list("abcxyz-_0123456789") + ["é", "ß", "中", "🙂"]
    made: set[str] = set()
    for _ in range(12):  # batches of growing size: several table resizes
        batch: list[str] = []
        while len(batch) < int(rng.integers(1, 3000)):
            text = "".join(rng.choice(alphabet, size=int(rng.integers(1, 20))))
            if text not in made:
                made.add(text)
                batch.append(text)
        ids.extend(batch)
        reference.extend(batch)
    lookup = {item_id: row for row, item_id in enumerate(reference)}
    assert len(ids) == len(reference)
    assert list(ids) == reference
    rows = ids.rows_of(reference)
    np.testing.assert_array_equal(rows, np.arange(len(reference)))
    missing = ["not-" + item_id for item_id in reference[:500]]
    assert all(item_id not in lookup for item_id in missing)
    np.testing.assert_array_equal(ids.rows_of(missing), np.full(500, -1))
    mixed = reference[::7] + missing[::3]
    expected = [lookup.get(item_id, -1) for item_id in mixed]
    np.testing.assert_array_equal(ids.rows_of(mixed), expected)
    assert ids.get(reference[17]) == 17
    assert ids.get("absent") is None


def test_equal_hashes_are_told_apart_by_their_text() -> None:
    ids = ItemIds()
    first = [_SameHash(f"item-{i}") for i in range(50)]
    ids.extend(first[:30])
    np.testing.assert_array_equal(ids.rows_of(first[:30]), np.arange(30))
    np.testing.assert_array_equal(ids.rows_of(first[30:]), np.full(20, -1))
    ids.extend(first[30:])
    np.testing.assert_array_equal(ids.rows_of(first[::-1]), np.arange(50)[::-1])
    assert [ids[row] for row in range(50)] == [str(item_id) for item_id in first]
