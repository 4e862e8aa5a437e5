"""The logbook suite (tests/logbook), unchanged, run against PostgreSQL.

Every test function and fixture of the suite's modules is collected here too, where the
``lb_path`` fixture is a fresh PostgreSQL schema instead of a SQLite file (see conftest).
The only tests left out are listed below with the reason: they look inside SQLite itself
(``sqlite_master``, ``PRAGMA``, a raw ``sqlite3`` connection or its exception class) or
use no logbook at all. Each SQLite-internal one has a PostgreSQL counterpart in
``test_postgresql_store.py``, named beside it. A test added to the suite later runs here
automatically; if it is SQLite-only it fails here until it is listed.
"""
from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

SUITE = Path(__file__).resolve().parent.parent / "logbook"
MODULES = ("test_schema", "test_writer", "test_export", "test_logbook_cmd")

#: module.test -> why it is not run against PostgreSQL (and its counterpart)
LEFT_OUT = {
    "test_schema.test_migrates_an_empty_file_to_the_latest_version":
        "reads sqlite_master and PRAGMA journal_mode; counterpart test_migrates_an_empty_store",
    "test_schema.test_migrates_a_version_1_logbook_keeping_its_data":
        "builds a version-1 file through store.connect (SQLite); counterpart "
        "test_migrates_a_version_1_store_keeping_its_data",
    "test_schema.test_refuses_a_logbook_from_a_newer_program":
        "writes the file with sqlite3; counterpart test_refuses_a_store_from_a_newer_program",
    "test_schema.test_tables_use_only_types_postgresql_also_has":
        "no logbook (an in-memory SQLite check); counterpart test_tables_have_the_declared_types",
    "test_schema.test_raw_records_cannot_be_changed":
        "expects sqlite3.IntegrityError; counterpart test_raw_records_cannot_be_changed_on_postgresql "
        "(the same statements)",
    "test_schema.test_a_running_sweep_accepts_points_but_not_edits":
        "expects sqlite3.IntegrityError; counterpart test_a_running_sweep_accepts_points_but_not_edits_pg",
    "test_writer.test_an_unknown_sweep_is_an_error_not_a_silent_loss":
        "expects sqlite3.IntegrityError; counterpart test_an_unknown_sweep_is_an_error_on_postgresql",
    "test_writer.test_default_location_follows_the_environment": "no logbook (file-name rules)",
    "test_writer.test_a_killed_writer_leaves_a_clean_logbook_with_every_printed_point":
        "PRAGMA integrity_check; counterpart test_a_killed_writer_loses_no_printed_point",
    "test_writer.test_a_held_write_lock_makes_the_writer_wait_not_fail":
        "holds SQLite's write lock through sqlite3; counterpart test_a_held_table_lock_makes_the_writer_wait",
    "test_writer.test_reading_never_waits_for_the_writer":
        "holds SQLite's write lock through sqlite3; counterpart test_reading_never_waits_for_a_writer_pg",
    "test_export.test_any_double_survives_store_and_csv":
        "writes its own SQLite file; counterpart test_any_double_survives_postgresql_and_csv",
    "test_export.test_safe_names": "no logbook (file-name rules)",
    "test_logbook_cmd.test_missing_logbook_exits_1":
        "a missing file; counterpart test_a_database_without_a_logbook_exits_1",
}


def _load(name: str, path: Path):
    """Import a suite module under a unique name (its own stays importable as before)."""
    if name not in sys.modules:
        spec = importlib.util.spec_from_file_location(name, path)
        module = importlib.util.module_from_spec(spec)
        sys.modules[name] = module
        spec.loader.exec_module(module)
    return sys.modules[name]


def _is_fixture(obj) -> bool:
    return (type(obj).__name__ == "FixtureFunctionDefinition"
            or hasattr(obj, "_pytestfixturefunction") or hasattr(obj, "_fixture_function_marker"))


COLLECTED: dict[str, str] = {}
for _module_name in MODULES:
    _module = _load(f"tracer_tests_logbook_{_module_name}", SUITE / f"{_module_name}.py")
    for _name, _obj in list(vars(_module).items()):
        _key = f"{_module_name}.{_name}"
        if _name.startswith("test_") and callable(_obj) and not _is_fixture(_obj):
            if _key in LEFT_OUT:
                continue
            assert _name not in COLLECTED, f"two suite tests named {_name}"
            COLLECTED[_name] = _module_name
            globals()[_name] = _obj
        elif _is_fixture(_obj) and _name not in ("lb_path", "run_events"):
            globals()[_name] = _obj


def test_every_left_out_test_exists_and_the_rest_is_collected():
    names = set()
    for module_name in MODULES:
        module = _load(f"tracer_tests_logbook_{module_name}", SUITE / f"{module_name}.py")
        names |= {f"{module_name}.{n}" for n in vars(module) if n.startswith("test_")}
    assert set(LEFT_OUT) <= names, set(LEFT_OUT) - names
    assert {f"{m}.{n}" for n, m in COLLECTED.items()} == names - set(LEFT_OUT)
    assert len(COLLECTED) >= 19

