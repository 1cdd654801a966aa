"""Plate geometry against ANSI/SLAS 4-2004 and well naming."""

import pytest

from plateloom.setup.plate_formats import (
    all_wells,
    canonical_well,
    is_edge_well,
    parse_well,
    plate_format,
)


@pytest.mark.parametrize("wells, rows, columns, pitch", [(96, 8, 12, 9.0), (384, 16, 24, 4.5), (1536, 32, 48, 2.25)])
def test_formats_follow_ansi_slas_4_2004(wells, rows, columns, pitch):
    # ANSI/SLAS 4-2004 well positions (values recalled from memory): 8 x 12 at 9 mm, 16 x 24 at
    # 4.5 mm, 32 x 48 at 2.25 mm.
    fmt = plate_format(wells)
    assert (fmt.rows, fmt.columns, fmt.well_pitch_mm) == (rows, columns, pitch)
    assert len(all_wells(fmt)) == wells == rows * columns
    # the pitch halves as the well count quadruples, keeping the same footprint
    assert fmt.columns * fmt.well_pitch_mm == pytest.approx(108.0)


def test_well_names_round_trip_and_bounds():
    fmt96, fmt1536 = plate_format(96), plate_format(1536)
    assert canonical_well("b7", fmt96) == "B07"
    assert parse_well("AF48") == (31, 47)
    assert canonical_well("AF48", fmt1536) == "AF48"
    with pytest.raises(ValueError, match="not on a 96-well plate"):
        canonical_well("M13", fmt96)
    with pytest.raises(ValueError, match="not a well name"):
        parse_well("7B")


def test_edge_wells():
    fmt = plate_format(96)
    assert is_edge_well("A05", fmt) and is_edge_well("H12", fmt) and is_edge_well("D01", fmt)
    assert not is_edge_well("D05", fmt)
    assert sum(is_edge_well(w, fmt) for w in all_wells(fmt)) == 36
