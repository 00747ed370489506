"""Shape parsing, canonical text and the leaf tables."""

from __future__ import annotations

import numpy as np
import pytest

from foldfarm.shape import MAX_CELLS, ShapeError, coordinates, neighbour_table, parse_shape, strides


@pytest.mark.parametrize(
    "text, sides, canonical",
    [("3x5", (3, 5), "3x5"), ("3×5", (3, 5), "3x5"), ("2x2x2", (2, 2, 2), "2x2x2"),
     (" 4X4 ", (4, 4), "4x4"), ("7", (7,), "7"), ("1x1", (1, 1), "1x1")],
)
def test_parse(text, sides, canonical):
    shape = parse_shape(text)
    assert shape.sides == sides
    assert shape.text == canonical
    assert parse_shape(shape.text) == shape


@pytest.mark.parametrize("text", ["0x5", "3x", "x", "-2x3", "3,5", "2.5x3", "", "  ", "3xx5", "ax3", "40x40"])
def test_malformed_shapes_are_one_sentence(text):
    with pytest.raises(ShapeError) as info:
        parse_shape(text)
    message = str(info.value)
    assert "\n" not in message and message


def test_cell_limit_is_stated():
    with pytest.raises(ShapeError, match=str(MAX_CELLS)):
        parse_shape(f"{MAX_CELLS + 1}")
    assert parse_shape(f"{MAX_CELLS}").cells == MAX_CELLS


def test_key_ignores_order_and_unit_sides():
    assert parse_shape("5x1x3").key == parse_shape("3x5").key == (3, 5)


def test_coordinates_are_mixed_radix_first_side_fastest():
    coord = coordinates((3, 2))
    # leaf:         0  1  2  3  4  5  6
    assert coord[0].tolist() == [0, 1, 2, 3, 1, 2, 3]
    assert coord[1].tolist() == [0, 1, 1, 1, 2, 2, 2]
    assert strides((3, 2)).tolist() == [1, 3]


def test_neighbour_table_starts_each_walk_at_the_lower_neighbour():
    sides = (3, 4, 2)
    table = neighbour_table(sides)
    coord = coordinates(sides)
    n = 24
    for l in range(1, n + 1):
        for i, s in enumerate(strides(sides)):
            expected = l if coord[i, l] == 1 else l - s
            assert table[l, i, l] == expected
    # entries beyond the placed leaves and the sentinel column are empty
    assert not np.any(table[:, :, 0])
    assert table[5, 0, 6] == 0


def test_neighbour_table_pairs_creases():
    # Within one class, D is an involution on the leaves that have a placed partner.
    sides = (4, 3)
    table = neighbour_table(sides)
    for l in range(1, 13):
        for i in range(2):
            for m in range(1, l + 1):
                partner = table[l, i, m]
                assert 1 <= partner <= l
                if partner != m:
                    assert table[l, i, partner] == m
