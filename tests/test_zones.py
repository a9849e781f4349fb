"""ISO 20816-3 severity zones: boundaries per class, boundary rule, overrides, bad limits."""

from __future__ import annotations

import pytest

from monitor.detection.zones import CLASS_LIMITS_MM_S, next_boundary, zone_limits, zone_of

# ISO 10816-3:2009 Table A.1/A.2, from memory: A/B, B/C, C/D in mm/s RMS.
ISO_TABLE = {
    "group1/rigid": (2.3, 4.5, 7.1),
    "group1/flexible": (3.5, 7.1, 11.0),
    "group2/rigid": (1.4, 2.8, 4.5),
    "group2/flexible": (2.3, 4.5, 7.1),
}


@pytest.mark.parametrize("cls", sorted(ISO_TABLE))
def test_class_boundaries(cls):
    # ISO 10816-3:2009 Table A.1/A.2, from memory.
    lim = zone_limits(cls)
    assert lim.as_tuple() == ISO_TABLE[cls]
    assert lim.source == cls


@pytest.mark.parametrize("cls", sorted(ISO_TABLE))
def test_assignment_at_and_around_each_boundary(cls):
    # ISO 10816-3:2009 Table A.1/A.2, from memory; boundary rule (ours, documented): a zone
    # includes its upper boundary.
    ab, bc, cd = ISO_TABLE[cls]
    lim = zone_limits(cls)
    eps = 1e-6
    assert zone_of(0.0, lim) == "A"
    assert zone_of(ab - eps, lim) == "A"
    assert zone_of(ab, lim) == "A"
    assert zone_of(ab + eps, lim) == "B"
    assert zone_of(bc, lim) == "B"
    assert zone_of(bc + eps, lim) == "C"
    assert zone_of(cd, lim) == "C"
    assert zone_of(cd + eps, lim) == "D"
    assert zone_of(10 * cd, lim) == "D"


def test_next_boundary():
    lim = zone_limits("group2/rigid")  # 1.4 / 2.8 / 4.5, ISO 10816-3 Table A.2 (from memory)
    assert next_boundary(1.0, lim) == ("A/B", 1.4)
    assert next_boundary(1.4, lim) == ("A/B", 1.4)
    assert next_boundary(2.0, lim) == ("B/C", 2.8)
    assert next_boundary(3.0, lim) == ("C/D", 4.5)
    assert next_boundary(5.0, lim) is None


def test_overrides_point_wins():
    # limits here are invented overrides; the checks are the precedence rule (docs/registry.md:
    # configured limits override the class defaults, a point's its machine's)
    # and the zone definition (2.5 lies between 2.0 and 3.0: zone C)
    lim = zone_limits("group2/rigid", machine_limits=(2.0, 3.0, 5.0))
    assert lim.as_tuple() == (2.0, 3.0, 5.0) and lim.source == "machine"
    lim = zone_limits("group2/rigid", machine_limits=(2.0, 3.0, 5.0), point_limits=(1.0, 2.0, 3.0))
    assert lim.as_tuple() == (1.0, 2.0, 3.0) and lim.source == "point"
    assert zone_of(2.5, lim) == "C"


@pytest.mark.parametrize("bad", [(3.0, 2.0, 5.0), (1.0, 1.0, 2.0), (1.0, 2.0, 1.5)])
def test_overlapping_limits_rejected(bad):
    with pytest.raises(ValueError, match="limits_mm_s.*overlap"):
        zone_limits("group2/rigid", machine_limits=bad)
    with pytest.raises(ValueError, match="point limits_mm_s"):
        zone_limits("group2/rigid", point_limits=bad)


def test_bad_limits_rejected():
    with pytest.raises(ValueError, match="limits_mm_s"):
        zone_limits("group2/rigid", machine_limits=(-1.0, 2.0, 3.0))
    with pytest.raises(ValueError, match="limits_mm_s"):
        zone_limits("group2/rigid", machine_limits=(1.0, 2.0))


def test_unknown_class_rejected():
    with pytest.raises(ValueError, match="class"):
        zone_limits("group3/rigid")


def test_table_covers_registry_classes():
    from monitor.model.registry import MACHINE_CLASSES

    assert set(CLASS_LIMITS_MM_S) == set(MACHINE_CLASSES)


def test_bad_value():
    with pytest.raises(ValueError, match="velocity_mm_s_rms"):
        zone_of(float("nan"), zone_limits("group1/rigid"))
