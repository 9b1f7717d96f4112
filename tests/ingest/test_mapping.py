"""Mapping files: the built-in one loads; mistakes are errors naming the key and a fix."""

from __future__ import annotations

from pathlib import Path

import pytest

from cohort.errors import MappingError
from cohort.ingest.mapping import BUILTIN_MAPPING, load_mapping


def test_builtin_mapping_covers_every_table():
    mapping = load_mapping()
    assert mapping.mapping_id == BUILTIN_MAPPING
    assert set(mapping.tables) == {"person", "ecg", "wave_event", "procedure", "diagnosis"}
    assert mapping.table_for(Path("ecgs.csv")).table == "ecg"
    assert mapping.table_for(Path("persons_part2.parquet")).table == "person"


def test_file_that_matches_no_table_is_refused_with_the_patterns():
    with pytest.raises(MappingError, match="does not say which table"):
        load_mapping().table_for(Path("lab_results.csv"))


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "m.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_unknown_key_names_the_nearest_valid_key(tmp_path):
    path = _write(tmp_path, '[table.person]\nfiles=["p*.csv"]\ndate_formts=["%d.%m.%Y"]\n'
                  '[table.person.columns]\nperson_key="id"\nbirth_date="dob"\nsex="sex"\nfollowup_end="end"\n')
    with pytest.raises(MappingError, match="date_formts.*did you mean 'date_formats'"):
        load_mapping(path)


def test_missing_required_column_is_named(tmp_path):
    path = _write(tmp_path, '[table.ecg]\nfiles=["e*.csv"]\n[table.ecg.columns]\necg_key="id"\nperson_key="pid"\n')
    with pytest.raises(MappingError, match="lacks required column.*acquired_at"):
        load_mapping(path)


def test_unknown_unit_is_refused(tmp_path):
    path = _write(tmp_path, '[table.ecg]\nfiles=["e*.csv"]\n[table.ecg.units]\npr_ms="cs"\n'
                  '[table.ecg.columns]\necg_key="id"\nperson_key="pid"\nacquired_at="t"\npr_ms="pr"\n')
    with pytest.raises(MappingError, match='use "ms" or "s"'):
        load_mapping(path)


def test_invalid_toml_is_a_mapping_error(tmp_path):
    with pytest.raises(MappingError, match="not valid TOML"):
        load_mapping(_write(tmp_path, "[table.person\n"))


def test_foreign_layout_example_loads():
    example = Path(__file__).resolve().parents[2] / "docs" / "examples" / "foreign-mapping.toml"
    mapping = load_mapping(example)
    assert mapping.tables["ecg"].options["units"]["pr_ms"] == "s"
