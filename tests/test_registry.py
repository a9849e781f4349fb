"""Machine registry: TOML round trip, validation messages, import/export through the store."""

from __future__ import annotations

import tomllib

import pytest
from fixtures_db import small_registry
from sqlalchemy import select

from monitor.model.registry import RegistryError
from monitor.model.registry_file import dump_registry, parse_registry
from monitor.store import export_registry, import_registry
from monitor.store.models import Machine as MachineRow
from monitor.store.models import ModeHistory

# A machine table with the keys of docs/registry.md (the binding key names).
REGISTRY_EXAMPLE = """
[[machines]]
id = "af-3"
name = "Supply air fan 3"
location = "Roof plant east"
class = "group2/flexible"
speed_range_rpm = [300, 1500]
excitation_orders = [1, 2, 9]
line_frequency_hz = 50

  [[machines.points]]
  id = "de-h"
  direction = "horizontal"
  quantity = "acceleration"
  unit = "m/s^2"
  fs_hz = 25600

  [[machines.modes]]
  name = "structure lateral"
  frequency_hz = 18.4
  damping_ratio = 0.03
  required_margin_pct = 15
  source = "impact test"
  date = 2026-03-04
"""


def test_toml_round_trip():
    registry = parse_registry(tomllib.loads(REGISTRY_EXAMPLE))
    assert parse_registry(tomllib.loads(dump_registry(registry))) == registry
    other = small_registry()
    assert parse_registry(tomllib.loads(dump_registry(other))) == other


@pytest.mark.parametrize(
    "edit, field",
    [
        (('class = "group2/flexible"', 'class = "group3/soft"'), "'class'"),
        (("frequency_hz = 18.4", "frequency_hz = -1"), "'frequency_hz'"),
        (("damping_ratio = 0.03", "damping_ratio = 1.5"), "'damping_ratio'"),
        (('unit = "m/s^2"', 'unit = "mm/s"'), "'unit'"),
        (("speed_range_rpm = [300, 1500]", "speed_range_rpm = [1500, 300]"), "'speed_range_rpm'"),
        (('id = "af-3"', 'id = "af 3"'), "'id'"),
        # Types are the file's own, never converted (docs/registry.md).
        (('name = "structure lateral"', 'name = 12'), "'name'"),
        (('source = "impact test"', 'source = 3.5'), "'source'"),
    ],
)
def test_validation_error_names_the_field(edit, field):
    bad = REGISTRY_EXAMPLE.replace(*edit)
    with pytest.raises(RegistryError) as exc:
        parse_registry(tomllib.loads(bad))
    assert field in str(exc.value)


def test_import_export_round_trip(store):
    registry = parse_registry(tomllib.loads(REGISTRY_EXAMPLE))
    with store.transaction() as s:
        report = import_registry(s, registry)
    assert report.machines_added == ["af-3"]
    with store.session() as s:
        assert export_registry(s) == registry
    # A plain import adds what it names and keeps af-3 ...
    with store.transaction() as s:
        report = import_registry(s, small_registry())
    assert report.machines_kept == ["af-3"] and report.machines_retired == []
    with store.session() as s:
        assert export_registry(s).machines == (*small_registry().machines, registry.machine("af-3"))
    # ... one with replace retires it, not deletes it: its history must survive.
    with store.transaction() as s:
        report = import_registry(s, small_registry(), replace=True)
    assert report.machines_retired == ["af-3"]
    with store.session() as s:
        assert export_registry(s) == small_registry()
        assert s.get(MachineRow, "af-3").active is False


def test_mode_changes_are_recorded(store):
    registry = parse_registry(tomllib.loads(REGISTRY_EXAMPLE))
    moved = parse_registry(tomllib.loads(REGISTRY_EXAMPLE.replace("frequency_hz = 18.4", "frequency_hz = 17.9")))
    with store.transaction() as s:
        import_registry(s, registry, user="ana")
    with store.transaction() as s:
        import_registry(s, registry, user="ana")  # unchanged: no history row
        import_registry(s, moved, user="ben")
    with store.session() as s:
        rows = s.execute(select(ModeHistory).order_by(ModeHistory.id)).scalars().all()
        assert [(r.change, r.changed_by) for r in rows] == [("created", "ana"), ("updated", "ben")]
        assert rows[1].old_values["frequency_hz"] == 18.4 and rows[1].new_values["frequency_hz"] == 17.9


def test_every_registry_key_is_documented():
    # docs/registry.md: further keys of a machine table are allowed, and every key read is documented
    import re
    import tomllib
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    documented = set(re.findall(r"^\| `([a-z_]+)` \|", (root / "docs" / "registry.md").read_text(), re.M))
    documented |= set(re.findall(r"^\| `([a-z_]+)` \|", (root / "docs" / "alarms.md").read_text(), re.M))
    plant = tomllib.loads((root / "sample_streams" / "plant.toml").read_text())
    used: set[str] = set()
    for m in plant["machines"]:
        used |= {k for k in m if k not in ("points", "modes")}
        for p in m.get("points", []):
            used |= set(p)
        for mode in m.get("modes", []):
            used |= set(mode)
    from monitor.model.registry_file import MACHINE_KEYS

    used |= MACHINE_KEYS - {"points", "modes"}
    assert used - documented == set()


# ----------------------------------------------------------------------------- strict file


@pytest.mark.parametrize("edit, named", [
    (("[[machines.modes]]", "[[machines.mode]]"), "'mode'"),
    (("[[machines.points]]", "[[machines.point]]"), "'point'"),
    (("excitation_orders = [1, 2, 9]", "excitation_order = [1, 2, 9]"), "'excitation_order'"),
    (("speed_range_rpm = [300, 1500]", "speed_range = [300, 1500]"), "'speed_range'"),
    (("[[machines]]", "[[machine]]"), "'machine'"),
    (("damping_ratio = 0.03", "damping_ration = 0.03"), "'damping_ration'"),
    (("damping_ratio = 0.03", "mode_shape = \"rocking\""), "'mode_shape'"),
    (('fs_hz = 25600', 'sample_rate = 25600'), "'sample_rate'"),
    # A misspelt quantity with a unit of another quantity: the unknown key is named, not
    # the unit checked against the default quantity (docs/registry.md, "Strict file").
    (('quantity = "acceleration"\n  unit = "m/s^2"', 'quantiy = "velocity"\n  unit = "mm/s"'), "'quantiy'"),
    (('quantity = "acceleration"', 'Quantity = "acceleration"'), "'Quantity'"),
])
def test_misspelt_tables_and_keys_are_errors_naming_them(edit, named):
    bad = REGISTRY_EXAMPLE.replace(*edit)
    assert bad != REGISTRY_EXAMPLE
    with pytest.raises(RegistryError) as exc:
        parse_registry(tomllib.loads(bad))
    msg = str(exc.value)
    assert named in msg
    if edit[0] != "[[machines]]":
        assert "'af-3'" in msg


def test_unknown_machine_keys_are_kept_exported_and_warned(store):
    from monitor.model.registry_file import registry_warnings

    text = REGISTRY_EXAMPLE.replace('line_frequency_hz = 50', 'line_frequency_hz = 50\nasset_tag = "P-1041"\n'
                                  'commissioned = { by = "ana", year = 2019 }')
    registry = parse_registry(tomllib.loads(text))
    (m,) = registry.machines
    assert m.settings == {"asset_tag": "P-1041", "commissioned": {"by": "ana", "year": 2019}}
    (warning,) = registry_warnings(registry)
    assert "'af-3'" in warning and "'asset_tag'" in warning and "'commissioned'" in warning
    assert parse_registry(tomllib.loads(dump_registry(registry))) == registry
    with store.transaction() as s:
        import_registry(s, registry)
    with store.session() as s:
        assert export_registry(s) == registry


@pytest.mark.parametrize("edit, key", [
    (("frequency_hz = 18.4", "frequency_hz = 1e-80"), "'frequency_hz'"),
    (("frequency_hz = 18.4", "frequency_hz = 0.05"), "'frequency_hz'"),
    (("frequency_hz = 18.4", "frequency_hz = 2e5"), "'frequency_hz'"),
    (("damping_ratio = 0.03", "damping_ratio = 0"), "'damping_ratio'"),
    (("damping_ratio = 0.03", "amplification_factor = 0.9"), "'amplification_factor'"),
    (("damping_ratio = 0.03", "amplification_factor = inf"), "'amplification_factor'"),
    (("speed_range_rpm = [300, 1500]", "speed_range_rpm = [0, 1500]"), "'speed_range_rpm'"),
    (("speed_range_rpm = [300, 1500]", "speed_range_rpm = [300, nan]"), "'speed_range_rpm'"),
    (("speed_range_rpm = [300, 1500]", "speed_range_rpm = [300, 1e300]"), "'speed_range_rpm'"),
    (("excitation_orders = [1, 2, 9]", "excitation_orders = [1, 2, 1e200]"), "'excitation_orders'"),
    (("line_frequency_hz = 50", "line_frequency_hz = 1e12"), "'line_frequency_hz'"),
    (('class = "group2/flexible"', 'class = "group2/flexible"\npersistence = 0'), "'persistence'"),
])
def test_physical_bounds_name_machine_entry_and_key(edit, key):
    bad = REGISTRY_EXAMPLE.replace(*edit)
    assert bad != REGISTRY_EXAMPLE
    with pytest.raises(RegistryError) as exc:
        parse_registry(tomllib.loads(bad))
    assert key in str(exc.value) and "'af-3'" in str(exc.value)


def test_edit_distance_known_values():
    from monitor.model.registry_file import edit_distance

    # Levenshtein's classic pair: kitten -> sitting takes 3 edits (textbook example).
    assert edit_distance("kitten", "sitting") == 3
    # Optimal string alignment counts a swap of neighbours as one edit, but edits no
    # substring twice: CA -> ABC is 3 (the unrestricted Damerau-Levenshtein distance is 2),
    # the standard example distinguishing the two (from memory).
    assert edit_distance("ab", "ba") == 1
    assert edit_distance("ca", "abc") == 3
    assert edit_distance("", "modes") == 5 and edit_distance("modes", "modes") == 0
